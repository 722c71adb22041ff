"""geosp: self-potential survey reduction and fault-source interpretation."""

__version__ = "0.1.0"
