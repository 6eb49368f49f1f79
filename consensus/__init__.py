"""consensus: the monthly demand review, from source files to one explained plan."""

__version__ = "0.1.0"
