"""rolewatch: streaming detection of structural role changes in interaction graphs."""

__version__ = "0.1.0"
