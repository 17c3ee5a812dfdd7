"""phaseward: keeps watch over multiphase power rails that can lose a phase and keep running."""

__version__ = "0.1.0"
