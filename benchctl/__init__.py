"""benchctl: characterise analog and RF boards across their supply rail over SCPI."""

__version__ = "0.1.0"
