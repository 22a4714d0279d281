"""labseq: unattended line x load validation of flyback snubbers over SCPI."""

__version__ = "0.1.0"
