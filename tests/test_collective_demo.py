"""The demo's collective conditions end to end: the decoupler's planted effect on the coupling readouts is
found with an interval excluding 0, the no-effect compound's intervals cover 0, deaths spread under LOOM-106."""

import pandas as pd
import pytest
import yaml
from conftest import copy_workflow, run_snakemake
from scipy import stats

from plateloom.demo.scenario import load_scenario, planted_collective
from plateloom.setup.screen_sheet import load_layout

KEPT = ("vehicle", "LOOM-104", "LOOM-105", "LOOM-106")


@pytest.fixture(scope="module")
def collective_screen(tmp_path_factory):
    """The demo screen (36 frames a site) with only the controls and the compounds without planted
    single-cell effects kept in the layout, to spend the time on the wells these tests read."""
    workdir = copy_workflow(tmp_path_factory.mktemp("collective") / "screen")
    layout_path = workdir / "config" / "layouts" / "demo_96.csv"
    layout = pd.read_csv(layout_path, dtype=str, keep_default_na=False)
    dropped = ~layout["condition"].isin(KEPT)
    layout.loc[dropped, ["role", "condition", "dose", "dose_unit"]] = ["empty", "", "", ""]
    layout.to_csv(layout_path, index=False)
    config_path = workdir / "config" / "config.yaml"
    config = yaml.safe_load(config_path.read_text())
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
