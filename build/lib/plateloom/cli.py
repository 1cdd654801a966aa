"""plateloom's command line: ``plateloom <command>`` or ``python -m plateloom <command>``.

Commands:
  run            run the workflow (the packaged Snakefile) on a config: the demo's, or your own
  demo           write the demo screen's config files into a folder, to run it from there
  scaffold       look at an image folder, infer the file naming, write config, screen sheet and layouts
  check          check config, screen sheet and layouts against the images on disk, every problem at once
  design-check   simulate the screen's own design: coverage of its 95% intervals and power
  config-reference  print every config key, type, default and description (Markdown)
"""

from __future__ import annotations

import argparse
import os
import sys

import pandas as pd

from plateloom.screen.design_check import (
    VarianceComponents,
    components_from_effects,
    design_check,
)


def _design_check(arguments: argparse.Namespace) -> int:
    model_path = os.path.join(arguments.results, "screen", "model_wells.parquet")
    effects_path = os.path.join(arguments.results, "effects.parquet")
    for path in (model_path,) + (() if arguments.components else (effects_path,)):
        if not os.path.isfile(path):
            print(
                f"plateloom design-check: {path} does not exist. Run the workflow first "
                f"(snakemake --cores N), or point --results at its results folder.",
                file=sys.stderr,
            )
            return 2
    design = pd.read_parquet(model_path)
    if arguments.components:
        components = VarianceComponents(*arguments.components)
    else:
        components = components_from_effects(pd.read_parquet(effects_path), arguments.feature)
    table = design_check(
        design, components, arguments.effect, arguments.screens, arguments.extra_batches, arguments.seed
    )
    print(
        f"variance components (model scale): batch {components.batch:.4g}, plate {components.plate:.4g}, "
        f"residual {components.residual:.4g}; planted effect {arguments.effect:g}"
    )
    print(table.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    return 0


def _scaffold(arguments: argparse.Namespace) -> int:
    from plateloom.errors import InputError
    from plateloom.setup.scaffold import survey_folder, write_scaffold

    try:
        survey = survey_folder(arguments.folder, arguments.plate_format)
        print(survey.text())
        if arguments.dry_run:
            return 0
        written = write_scaffold(survey, arguments.out, arguments.force)
    except InputError as error:
        print(f"plateloom scaffold: {error}", file=sys.stderr)
        return 2
    print("written: " + ", ".join(written))
    print(
        f"next: fill in the layout(s) (roles negative_control, positive_control, test, empty; condition, dose, "
        f"dose_unit), then `plateloom check --config {written[0]}` and "
        f"`plateloom run --cores 2 --config {written[0]}` from this folder."
    )
    return 0


def _check(arguments: argparse.Namespace) -> int:
    from plateloom.errors import InputError
    from plateloom.setup.check import check_screen, load_config

    try:
        config = load_config(arguments.config)
    except (InputError, OSError) as error:
        print(f"plateloom check: {error}", file=sys.stderr)
        return 2
    report = check_screen(config, read_headers=not arguments.names_only)
    print(report.text())
    return 1 if report.errors else 0


def _run(arguments: argparse.Namespace, snakemake_arguments: list[str]) -> int:
    import subprocess

    from plateloom.assets import snakefile

    if not os.path.isfile(arguments.config):
        print(
            f"plateloom run: no config file {arguments.config!r} here. Fix: give --config PATH (from "
            f"`plateloom scaffold`), or write the demo's with `plateloom demo` first.",
            file=sys.stderr,
        )
        return 2
    command = [
        sys.executable,
        "-m",
        "snakemake",
        "--snakefile",
        str(snakefile()),
        "--configfile",
        arguments.config,
        "--cores",
        str(arguments.cores),
        *snakemake_arguments,
    ]
    print("running: " + " ".join(command), flush=True)
    return subprocess.call(command)


def _demo(arguments: argparse.Namespace) -> int:
    import shutil

    from plateloom.assets import demo_config_folder

    target = os.path.join(arguments.out, "config")
    if os.path.exists(os.path.join(target, "config.yaml")) and not arguments.force:
        print(
            f"plateloom demo: {target}/config.yaml exists already. Fix: run `plateloom run` there, or choose "
            f"another --out folder, or add --force.",
            file=sys.stderr,
        )
        return 2
    shutil.copytree(
        demo_config_folder(), target, dirs_exist_ok=True, ignore=shutil.ignore_patterns("__init__.py", "__pycache__")
    )
    print(
        f"written: {target}/ (config.yaml, plates.csv, layouts/). Next: `plateloom run --cores 2` in {arguments.out}."
    )
    return 0


def main(argv: list[str] | None = None) -> int:
    """Entry point; returns the exit status."""
    parser = argparse.ArgumentParser(prog="plateloom", description=__doc__.split("\n")[0])
    commands = parser.add_subparsers(dest="command", required=True)
    check = commands.add_parser("design-check", help="coverage and power of the screen's design, by simulation")
    check.add_argument("--results", default="results", help="results folder of a finished run (default: results)")
    check.add_argument("--feature", default="area_um2", help="feature whose fitted variance components to use")
    check.add_argument(
        "--components",
        type=float,
        nargs=3,
        metavar=("BATCH", "PLATE", "RESIDUAL"),
        help="variance components to use instead (model scale, e.g. natural-log units squared)",
    )
    check.add_argument("--effect", type=float, default=0.2, help="planted effect on the model scale (default 0.2)")
    check.add_argument("--screens", type=int, default=200, help="simulated screens per design (default 200)")
    check.add_argument("--extra-batches", type=int, nargs="*", default=[2], help="also try this many more batches")
    check.add_argument("--seed", type=int, default=1)
    scaffold = commands.add_parser("scaffold", help="infer a screen from an image folder and write its config files")
    scaffold.add_argument("folder", help="image folder: one plate, or one sub-folder per plate")
    scaffold.add_argument(
        "--out", default="screen", help="folder for config.yaml, plates.csv, layouts/ (default: screen)"
    )
    scaffold.add_argument(
        "--plate-format", type=int, choices=[96, 384, 1536], help="plate format (default: the smallest that fits)"
    )
    scaffold.add_argument("--force", action="store_true", help="replace files the scaffold wrote before")
    scaffold.add_argument("--dry-run", action="store_true", help="only show what was found")
    preflight = commands.add_parser(
        "check", help="check config, sheet and layouts against the images, all problems at once"
    )
    preflight.add_argument("--config", default="config/config.yaml", help="config file (default: config/config.yaml)")
    preflight.add_argument("--names-only", action="store_true", help="do not read image headers (faster)")
    commands.add_parser("config-reference", help="every config key, type, default and description, as Markdown")
    run = commands.add_parser("run", help="run the workflow on a config; further arguments go to Snakemake")
    run.add_argument("--config", default="config/config.yaml", help="config file (default: config/config.yaml)")
    run.add_argument("--cores", type=int, default=2, help="cores to use (default: 2)")
    demo = commands.add_parser("demo", help="write the demo screen's config files into a folder")
    demo.add_argument("--out", default=".", help="folder to write config/ into (default: the current folder)")
    demo.add_argument("--force", action="store_true", help="replace the demo's files written before")
    arguments, extra = parser.parse_known_args(argv)
    if arguments.command == "run":
        return _run(arguments, extra)
    if extra:
        parser.error(f"unrecognized arguments: {' '.join(extra)}")
    if arguments.command == "demo":
        return _demo(arguments)
    if arguments.command == "config-reference":
        from plateloom.setup.config import config_reference

        print(config_reference(), end="")
        return 0
    if arguments.command == "design-check":
        return _design_check(arguments)
    if arguments.command == "scaffold":
        return _scaffold(arguments)
    if arguments.command == "check":
        return _check(arguments)
    return 1


if __name__ == "__main__":
    sys.exit(main())
