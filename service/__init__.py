"""bioparity: bioequivalence and ratio-estimate analyses of crossover studies."""

from __future__ import annotations

__version__ = "0.1.0"
