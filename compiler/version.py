"""The toposcout version; part of every cache key, so bump it when results change."""

__version__ = "0.1.0"
