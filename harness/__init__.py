"""harness: score sentence-embedding setups for topic discovery."""

__version__ = "0.1.0"
