"""SCPI instrument drivers over PyVISA: one base class, one small class per bench role."""
