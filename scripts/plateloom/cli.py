"""plateloom's command line: ``plateloom <command>`` or ``python -m plateloom <command>``.

Commands:
  design-check   simulate the screen's own design: coverage of its 95% intervals and power
"""

from __future__ import annotations

import argparse
import os
import sys

import pandas as pd

from .design_check import VarianceComponents, components_from_effects, design_check


def _design_check(arguments: argparse.Namespace) -> int:
    model_path = os.path.join(arguments.results, "screen", "model_wells.parquet")
    effects_path = os.path.join(arguments.results, "effects.parquet")
    for path in (model_path,) + (() if arguments.components else (effects_path,)):
        if not os.path.isfile(path):
            print(f"plateloom design-check: {path} does not exist. Run the workflow first "
                  f"(snakemake --cores N), or point --results at its results folder.", file=sys.stderr)
            return 2
    design = pd.read_parquet(model_path)
    if arguments.components:
        components = VarianceComponents(*arguments.components)
    else:
        components = components_from_effects(pd.read_parquet(effects_path), arguments.feature)
    table = design_check(design, components, arguments.effect, arguments.screens, arguments.extra_batches,
                         arguments.seed)
    print(f"variance components (model scale): batch {components.batch:.4g}, plate {components.plate:.4g}, "
          f"residual {components.residual:.4g}; planted effect {arguments.effect:g}")
    print(table.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    return 0


def main(argv: list[str] | None = None) -> int:
    """Entry point; returns the exit status."""
    parser = argparse.ArgumentParser(prog="plateloom", description=__doc__.split("\n")[0])
    commands = parser.add_subparsers(dest="command", required=True)
    check = commands.add_parser("design-check", help="coverage and power of the screen's design, by simulation")
    check.add_argument("--results", default="results", help="results folder of a finished run (default: results)")
    check.add_argument("--feature", default="area_um2", help="feature whose fitted variance components to use")
    check.add_argument("--components", type=float, nargs=3, metavar=("BATCH", "PLATE", "RESIDUAL"),
                       help="variance components to use instead (model scale, e.g. natural-log units squared)")
    check.add_argument("--effect", type=float, default=0.2, help="planted effect on the model scale (default 0.2)")
    check.add_argument("--screens", type=int, default=200, help="simulated screens per design (default 200)")
    check.add_argument("--extra-batches", type=int, nargs="*", default=[2], help="also try this many more batches")
    check.add_argument("--seed", type=int, default=1)
    arguments = parser.parse_args(argv)
    if arguments.command == "design-check":
        return _design_check(arguments)
    return 1


if __name__ == "__main__":
    sys.exit(main())
