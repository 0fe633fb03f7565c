"""The ``[scan]`` settings and the scoring's parameters map by name and cannot drift (issue 19)."""

from dataclasses import fields

from ebbwatch.api.common import SCORING_ONLY, SELECTION_SETTINGS, _scan_params, scan_settings_for_scoring
from ebbwatch.config import Config, ScanConfig
from ebbwatch.detect import ScanParams


def test_every_setting_and_every_parameter_is_accounted_for():
    settings = {f.name for f in fields(ScanConfig)}
    params = {f.name for f in fields(ScanParams)}
    shared = settings & params
    # A new [scan] setting must be a scoring parameter or be listed as used by the selection only;
    # a new scoring parameter must be a setting or be listed as not configurable.
    assert settings - shared == set(SELECTION_SETTINGS), "a [scan] setting neither scores nor selects"
    assert params - shared == set(SCORING_ONLY), "a ScanParams field is neither a setting nor listed as scoring-only"
    assert set(scan_settings_for_scoring()) == shared


def test_shared_fields_have_the_same_defaults():
    config, params = ScanConfig(), ScanParams()
    for name in scan_settings_for_scoring():
        assert getattr(config, name) == getattr(params, name), name


def test_a_setting_reaches_the_scoring():
    from dataclasses import replace

    cfg = Config()
    for name in scan_settings_for_scoring():
        changed = replace(cfg, scan=replace(cfg.scan, **{name: getattr(cfg.scan, name) + 1}))
        assert getattr(_scan_params(changed), name) == getattr(cfg.scan, name) + 1, name
