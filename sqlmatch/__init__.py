"""sqlmatch: observational-study matching compiled to SQL and run in the warehouse."""

__version__ = "0.1.0"
