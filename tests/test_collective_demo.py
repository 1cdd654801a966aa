"""The demo's full-length conditions end to end (36 frames a site): the decoupler's planted effect on the
coupling readouts is found with an interval excluding 0, the no-effect compound's intervals cover 0, deaths
spread under LOOM-106; the compounds with planted time courses act when they were planted to act; the
cytostatic and cytotoxic compounds' planted division and death rates are inside their intervals and
their modes of action are called (the null compound: no growth effect)."""

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import copy_workflow, run_snakemake
from scipy import stats

from plateloom.demo.scenario import load_scenario, planted_collective, planted_fate, planted_time_courses
from plateloom.setup.screen_sheet import load_layout

KEPT = ("vehicle", "LOOM-104", "LOOM-105", "LOOM-106", "LOOM-107", "LOOM-108", "LOOM-109", "LOOM-110", "LOOM-111")
REPORTER = "mean_intensity_reporter"


@pytest.fixture(scope="module")
def collective_screen(tmp_path_factory):
    """The demo screen (36 frames a site) with only the controls, the compounds without planted
    endpoint effects and those with planted time courses kept in the layout, to spend the time on
    the wells these tests read."""
    workdir = copy_workflow(tmp_path_factory.mktemp("collective") / "screen")
    layout_path = workdir / "config" / "layouts" / "demo_96.csv"
    layout = pd.read_csv(layout_path, dtype=str, keep_default_na=False)
    dropped = ~layout["condition"].isin(KEPT)
    layout.loc[dropped, ["role", "condition", "dose", "dose_unit"]] = ["empty", "", "", ""]
    layout.to_csv(layout_path, index=False)
    config_path = workdir / "config" / "config.yaml"
    config = yaml.safe_load(config_path.read_text())
    config["demo"]["size"] = "full"  # 36 frames of 160 px: the collective and kinetic compounds' own world
    config["screen"]["design_check"]["n_screens"] = 10
    config["screen"]["dose_response"]["features"] = ["area_um2"]
    config_path.write_text(yaml.safe_dump(config, sort_keys=False))
    run_snakemake(workdir)
    return workdir


@pytest.mark.slow
def test_decoupler_moves_the_coupling_readouts_and_the_null_compound_does_not(collective_screen):
    scenario = load_scenario(str(collective_screen / "resources/demo/scenario.yaml"))
    assert scenario["frames"] >= 36
    layout = load_layout(str(collective_screen / "config/layouts/demo_96.csv"), 96)
    truth = planted_collective(scenario, layout)
    effects = pd.read_parquet(collective_screen / "results/effects.parquet")
    decoupled = truth[(truth["quantity"] == "coupling") & (truth["ratio"] < 0.1)]
    assert set(decoupled["condition"]) == {"LOOM-105"}
    for _, planted in decoupled.iterrows():
        for readout in planted["readouts"]:
            row = effects[(effects["treatment"] == planted["treatment"]) & (effects["feature"] == readout)].iloc[0]
            # The planted coupling is removed: every coupling readout falls, with a 95% CI below 0.
            assert row["ci_high"] < 0, (planted["treatment"], readout, row["estimate"], row["ci_low"], row["ci_high"])
    # The no-effect compound: simultaneous 95% intervals (Bonferroni over its doses and the readouts) cover 0.
    readouts = [r for rs in truth["readouts"] for r in rs]
    null = effects[(effects["condition"] == "LOOM-104") & effects["feature"].isin(readouts)]
    assert len(null) == 4 * len(set(readouts))
    wide = stats.t.ppf(1 - 0.025 / len(null), null["df"]) * null["std_error"]
    assert ((null["estimate"] - wide <= 0) & (0 <= null["estimate"] + wide)).all(), null[
        ["treatment", "feature", "estimate"]
    ]


@pytest.mark.slow
def test_deaths_spread_under_the_spreading_compound(collective_screen):
    wells = pd.concat(
        [pd.read_parquet(p) for p in sorted((collective_screen / "results/wells").glob("plate=*/*.parquet"))]
    )
    kept = wells[wells["excluded_by"] == ""]
    spreading = kept[(kept["condition"] == "LOOM-106") & (kept["dose"] == 10)]
    control = kept[kept["role"] == "negative_control"]
    # Events cluster in space and time beyond chance (Knox test per well; combined by Fisher's method).
    p_values = spreading["spreading_p_value"].dropna().to_numpy()
    assert stats.combine_pvalues(p_values, method="fisher")[1] < 1e-3
    # Wells with fewer than two events have an index of exactly 1, so compare means, not medians.
    assert spreading["spreading_index"].mean() > control["spreading_index"].mean()
    assert spreading["n_events"].mean() > 2 * control["n_events"].mean()


def _curve(effects: pd.DataFrame, condition: str, feature: str = REPORTER) -> pd.DataFrame:
    return effects[(effects["condition"] == condition) & (effects["feature"] == feature)].sort_values("window")


@pytest.mark.slow
def test_planted_time_courses_are_recovered_over_time(collective_screen):
    scenario = load_scenario(str(collective_screen / "resources/demo/scenario.yaml"))
    layout = load_layout(str(collective_screen / "config/layouts/demo_96.csv"), 96)
    truth = planted_time_courses(scenario, layout)
    effects = pd.read_parquet(collective_screen / "results/effects_over_time.parquet")
    summary = pd.read_parquet(collective_screen / "results/kinetic_summary.parquet").set_index(["condition", "feature"])
    window = 30.0  # kinetics.window_min (the schema default)
    assert (effects["window_end_min"] - effects["window_start_min"] == window).all()
    assert effects["window"].nunique() == 6  # 36 frames at 5 min
    # The delayed compound: planted onset in the window holding the first frame with an effect
    # (75 min + one frame: the window starting at 60 min); recovered within one window.
    delayed = truth[truth["condition"] == "LOOM-107"]
    planted_onset = window * np.floor(delayed.loc[delayed["reporter_ratio"] > 1, "time_min"].min() / window)
    assert planted_onset == 60.0
    onset = summary.loc[("LOOM-107", REPORTER), "onset_min"]
    assert abs(onset - planted_onset) <= window, onset
    # Before the onset the band covers no effect; on the plateau (every frame at the full ratio)
    # it covers the planted log ratio.
    curve = _curve(effects, "LOOM-107")
    early = curve[curve["window_end_min"] <= 75.0]
    assert ((early["band_low"] <= 0) & (0 <= early["band_high"])).all(), early[["window", "estimate"]]
    plateau = curve[curve["window_start_min"] >= 90.0]
    full = np.log(delayed["reporter_ratio"].max())
    assert ((plateau["band_low"] <= full) & (full <= plateau["band_high"])).all(), plateau[["window", "estimate"]]
    # The transient compound peaks early (planted at 40 min: the window 30-60 min, or the one next to
    # it) and wears off: its last window holds less than half of its peak effect.
    transient = summary.loc[("LOOM-108", REPORTER)]
    assert transient["peak_effect"] < 0 and transient["peak_time_min"] <= 75.0
    last = _curve(effects, "LOOM-108").iloc[-1]
    assert abs(last["estimate"]) < 0.5 * abs(transient["peak_effect"])
    # The slow compound builds up: its peak in the last two windows, half of it reached after the
    # transient compound's.
    slow = summary.loc[("LOOM-109", REPORTER)]
    assert slow["peak_time_min"] >= 120.0 and slow["half_max_time_min"] > transient["half_max_time_min"]
    # The no-effect compound has no significant window after FDR, on any feature.
    null = effects[effects["condition"] == "LOOM-104"]
    assert len(null) and (null["q_value"] >= 0.05).all() and not null["hit"].any()
    assert summary.xs("LOOM-104", level="condition")["onset_min"].isna().all()


@pytest.mark.slow
def test_time_course_tables_open_as_one_dataset_with_every_reader(collective_screen):
    import pyarrow.dataset as ds
    import pyarrow.parquet as pq

    folder = collective_screen / "results/time_courses"
    with_pandas = pd.read_parquet(folder)
    with_pyarrow = pq.read_table(folder).to_pandas()
    plain = ds.dataset(folder, format="parquet").to_table()
    assert len(with_pandas) == len(with_pyarrow) == plain.num_rows > 0
    assert with_pandas["plate"].nunique() == 6 and set(plain.column("plate").to_pylist()) == set(with_pandas["plate"])
    import duckdb

    query = f"select count(*), count(distinct plate) from read_parquet('{folder}/*/*.parquet')"
    counted = duckdb.sql(query).fetchall()[0]
    assert counted == (len(with_pandas), 6)
    # Reports: the screen report shows the effect curves, each plate report its controls over time.
    screen = (collective_screen / "results/reports/screen.html").read_text()
    assert 'alt="effects over time mean_intensity_reporter"' in screen and "LOOM-107" in screen
    plate = (collective_screen / "results/reports/plates/WV-D1-P1.html").read_text()
    assert 'alt="negative controls over time"' in plate


@pytest.mark.slow
def test_planted_division_and_death_rates_and_modes_of_action_are_recovered(collective_screen):
    scenario = load_scenario(str(collective_screen / "resources/demo/scenario.yaml"))
    layout = load_layout(str(collective_screen / "config/layouts/demo_96.csv"), 96)
    truth = planted_fate(scenario, layout).set_index("treatment")
    effects = pd.read_parquet(collective_screen / "results/fate_effects.parquet").set_index(["measure", "treatment"])
    for treatment, measure, column in (
        ("LOOM-110 30 uM", "division_rate", "division_ratio"),
        ("LOOM-110 3 uM", "division_rate", "division_ratio"),
        ("LOOM-111 30 uM", "death_rate", "death_ratio"),
        ("LOOM-111 3 uM", "death_rate", "death_ratio"),
    ):
        row, planted = effects.loc[(measure, treatment)], truth.loc[treatment, column]
        assert row["ci_low"] <= planted <= row["ci_high"], (treatment, measure, planted, row.to_dict())
    assert effects.loc[("division_rate", "LOOM-110 30 uM"), "ci_high"] < 1.0  # slower division is found
    hazard = effects.loc[("death_hazard", "LOOM-111 30 uM")]
    assert hazard["ci_low"] > 1.0, hazard.to_dict()
    for treatment in ("LOOM-104 30 uM", "LOOM-110 30 uM"):
        null = effects.loc[("death_rate", treatment)]
        assert null["ci_low"] <= 1.0 <= null["ci_high"], (treatment, null.to_dict())
    modes = pd.read_parquet(collective_screen / "results/gr_curves.parquet").set_index("condition")["mode"]
    assert modes["LOOM-110"] == "cytostatic" and modes["LOOM-111"] == "cytotoxic", modes.to_dict()
    assert modes["LOOM-104"] == "no growth effect", modes.to_dict()
    survival = pd.read_parquet(collective_screen / "results/survival.parquet")
    end = survival[survival["time_min"] == survival["time_min"].max()].set_index("treatment")
    assert end.loc["LOOM-111 30 uM", "ci_high"] < end.loc["vehicle", "ci_low"]  # fewer survivors under the toxin
