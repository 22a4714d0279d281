"""``python -m labseq``: the same as the ``labseq`` command."""

from labseq.cli import main

main()
