"""plateloom: multi-plate live-cell imaging screens, from images to condition effects.

The package holds pure functions; the Snakemake rules in ``workflow/rules`` call the thin
entry scripts in ``scripts/steps``, which call into here.
"""

__version__ = "0.1.0"
