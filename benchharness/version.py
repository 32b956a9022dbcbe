"""The version of benchharness (one place; recorded in every results folder)."""

__version__ = "0.1.0"
