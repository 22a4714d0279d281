"""Simulated bench: SCPI servers on loopback sharing one physical flyback model."""
