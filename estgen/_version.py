"""The estgen version: named in every generated file."""

__version__ = "0.1.0"
