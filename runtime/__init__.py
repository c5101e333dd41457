"""Running compiled studies: planning lanes, executing, storing, replaying and comparing."""

__version__ = "0.1.0"
