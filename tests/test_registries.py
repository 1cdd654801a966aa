"""The registries (columns, methods, exclusion rules, settings) agree with the config schema and
with the tables the stages write: one source for each name and default."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from plateloom import columns
from plateloom.plate import exclusions
from plateloom.plate.exclusions import EXCLUSION_RULES, ExclusionRule, ExclusionRules, well_exclusions
from plateloom.plate.normalization import NORMALIZATIONS
from plateloom.plate.stage import PlateSettings
from plateloom.screen.batch_correction import BATCH_CORRECTIONS
from plateloom.screen.kinetics import KineticSettings
from plateloom.screen.nested_fit import FITTERS
from plateloom.settings import load_schema, schema_defaults
from plateloom.setup.plan import resolve_features
from plateloom.well.collective import CollectiveSettings
from plateloom.well.features import object_columns
from plateloom.well.illumination import METHODS as ILLUMINATION_METHODS
from plateloom.well.illumination import IlluminationSettings
from plateloom.well.stage import WellSettings
from plateloom.well.thresholds import THRESHOLD_METHODS
from plateloom.well.tracking import track_features

SCHEMA = load_schema()["properties"]


def _enum(*path: str) -> list[str]:
    spec = SCHEMA
    for key in path[:-1]:
        spec = spec[key]["properties"]
    return list(spec[path[-1]]["enum"])


@pytest.mark.parametrize(
    ("registry", "path"),
    [
        (THRESHOLD_METHODS, ("segmentation", "threshold_method")),
        (NORMALIZATIONS, ("plate", "normalization")),
        (BATCH_CORRECTIONS, ("screen", "batch_correction")),
        (dict.fromkeys(ILLUMINATION_METHODS), ("illumination", "method")),
        (dict.fromkeys(FITTERS), ("screen", "fitter")),
    ],
)
def test_method_registries_equal_the_schema_enums(registry, path):
    assert sorted(registry) == sorted(_enum(*path))


def test_every_exclusion_rule_has_its_threshold_key_in_the_schema():
    keys = set(SCHEMA["exclusion_rules"]["properties"]) - {"z_prime_feature"}
    assert {rule.name for rule in EXCLUSION_RULES} == keys
    assert all(
        rule.level in ("site_frame", "well", "plate") and rule.bound in ("min", "max") for rule in EXCLUSION_RULES
    )


def test_normalization_suffixes_are_known_as_derived_columns():
    for method in NORMALIZATIONS.values():
        if method.suffix:
            assert columns.is_derived("area_um2" + method.suffix)
            assert not columns.well_features(["area_um2", "area_um2" + method.suffix]) == []
            assert columns.well_features(["area_um2" + method.suffix]) == []


def test_every_column_the_well_stage_writes_is_registered():
    per_object = object_columns(["nuclear", "reporter"], ["nuclear"], with_cells=True)
    frame = np.repeat(np.arange(4), 2)
    track = np.tile([1, 2], 4)
    motility = track_features(frame, track, frame * 1.0, frame * 0.5, 5.0, 3)
    assert columns.unregistered(per_object + list(motility) + ["plate", "well", "site", "frame", "time_min"]) == []
    readouts = ["phase_order_reporter", "coupled_link_fraction_d2_reporter", "spreading_index", "n_events"]
    assert columns.unregistered(readouts) == []
    assert columns.unregistered(["area_um2_robust_z", "no_such_column"]) == ["no_such_column"]


def test_feature_kinds_come_from_the_registry():
    cells = ["plate", "well", "object", "area_um2", "mean_intensity_dna", "touches_border", "centroid_x_um"]
    assert columns.observation_features(cells) == ["area_um2", "mean_intensity_dna"]
    tracks = ["track", "n_frames", "duration_min", "speed_um_per_min", "track_cv_rep", "period_min_rep"]
    assert columns.track_features(tracks) == ["speed_um_per_min", "track_cv_rep", "period_min_rep"]
    wells = ["plate", "batch", "cell_count", "area_um2", "area_um2_robust_z", "n_tracks", "spreading_p_value"]
    assert columns.well_features(wells) == ["cell_count", "area_um2"]


def test_default_screen_features_are_registered_well_features_with_their_scale():
    config = schema_defaults()
    config["channels"] = [{"name": "dna", "role": "nuclei"}, {"name": "rep", "role": "reporter"}]
    features = resolve_features(config["screen"]["features"], config)
    assert columns.well_features(features) == features
    for name in resolve_features(config["screen"]["log_scale_features"], config):
        assert columns.lookup(name).scale == "log", name


def _schema_default(section: str, key: str):
    return SCHEMA[section]["properties"][key].get("default")


@pytest.mark.parametrize(
    ("settings", "section"),
    [
        (CollectiveSettings, "collective"),
        (IlluminationSettings, "illumination"),
        (ExclusionRules, "exclusion_rules"),
        (PlateSettings, "plate"),
        (KineticSettings, "kinetics"),
    ],
)
def test_settings_defaults_are_the_schema_defaults(settings, section):
    made = settings.defaults()
    for key, value in vars(made).items():
        assert value == _schema_default(section, key), key


def test_well_settings_defaults_are_the_schema_defaults():
    made = WellSettings.defaults()
    assert made.max_gap_frames == _schema_default("tracking", "max_gap_frames")
    assert made.max_displacement_um == _schema_default("tracking", "max_displacement_um")
    assert made.min_nucleus_area_um2 == _schema_default("segmentation", "min_nucleus_area_um2")
    assert made.split_min_distance_um == _schema_default("segmentation", "split_min_distance_um")
    assert made.texture_levels == _schema_default("measurement", "texture_levels")
    assert WellSettings.defaults(max_gap_frames=0).max_gap_frames == 0


def test_a_well_failing_two_rules_names_both(monkeypatch):
    second = ExclusionRule("min_cells_per_well", "well", "n_tracks", "min")
    monkeypatch.setattr(exclusions, "EXCLUSION_RULES", (*EXCLUSION_RULES, second))
    profile = pd.DataFrame({"plate": "P1", "well": ["A01", "A02"], "cell_count": [2.0, 50.0], "n_tracks": [1, 40]})
    marked, ledger = well_exclusions(profile, ExclusionRules.defaults(min_cells_per_well=5))
    assert marked["excluded_by"].tolist() == ["min_cells_per_well: 2.0 < 5; min_cells_per_well: 1.0 < 5", ""]
    assert len(ledger) == 2 and set(ledger["well"]) == {"A01"}


def test_a_screen_without_a_reporter_models_each_feature_once():
    from plateloom.setup.plan import resolve_features

    config = {"channels": [{"name": "dapi", "role": "nuclei"}]}
    names = ["cell_count", "mean_intensity_{nuclei}", "mean_intensity_{reporter}", "area_um2"]
    assert resolve_features(names, config) == ["cell_count", "mean_intensity_dapi", "area_um2"]
