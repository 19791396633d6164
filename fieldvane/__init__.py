"""fieldvane: from lock-in outputs of a two-isotope vector atomic magnetometer to field vectors."""

__version__ = "0.1.0"
