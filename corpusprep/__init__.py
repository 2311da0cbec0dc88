"""corpusprep: raw text folder in, leak-free next-token training windows out."""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]
