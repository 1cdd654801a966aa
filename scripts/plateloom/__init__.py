"""plateloom: multi-plate live-cell imaging screens, from images to condition effects.

One subpackage per stage of the workflow: ``setup`` (screen sheet, layouts, plan, checks),
``io`` (image readers, tables), ``well`` (per-well analysis), ``plate`` (plate fan-in),
``screen`` (screen fan-in), ``report`` and ``demo``. The Snakemake rules in
``plateloom.workflow`` (the checkout's ``workflow/``) call thin entry scripts that call into
here; the package itself holds no Snakemake object.
"""

__version__ = "0.3.0"
