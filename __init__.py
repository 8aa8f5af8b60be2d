"""swarmaudit: audit the particle dumps of block-structured particle simulations."""

__version__ = "0.1.0"
