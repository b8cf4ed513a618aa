"""Config errors name the file, the key and the valid choices."""

import datetime as dt

import pytest
import yaml
from pydantic import ValidationError

from pipelines.calendar import resolve_cycle_date
from pipelines.config import load_config, parse_config
from pipelines.errors import ConfigError

MINIMAL = {"product_classes": {"fast": {"window": 8}}}


def write(tmp_path, data) -> str:
    path = tmp_path / "planning.yaml"
    path.write_text(yaml.safe_dump(data))
    return str(path)


def test_bundled_config_is_valid():
    config = load_config("config/planning.yaml")
    assert set(config.product_classes) == {"consumables", "seasonal", "spares"}
    assert config.calendar.period == "week"


def test_config_is_frozen():
    config = parse_config(MINIMAL)
    with pytest.raises(ValidationError, match="frozen"):
        config.calendar = None  # type: ignore[misc]


def test_unknown_key_names_file_key_and_valid_keys(tmp_path):
    path = write(tmp_path, {"product_classes": {"fast": {"window": 8, "windw": 9}}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    text = str(err.value)
    assert path in text
    assert "product_classes.fast.windw" in text
    assert "unknown key" in text
    assert "'window'" in text and "'method'" in text and "'fallback_windows'" in text


def test_unknown_top_level_section_lists_sections(tmp_path):
    path = write(tmp_path, {**MINIMAL, "calender": {}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert "calender" in str(err.value)
    assert "'calendar'" in str(err.value) and "'product_classes'" in str(err.value)


def test_wrong_type_names_the_key(tmp_path):
    path = write(tmp_path, {"product_classes": {"fast": {"window": "twenty"}}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert "product_classes.fast.window" in str(err.value)
    assert "'twenty'" in str(err.value)


def test_bad_choice_lists_the_valid_choices(tmp_path):
    path = write(tmp_path, {"product_classes": {"fast": {"window": 8, "method": "average"}}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    text = str(err.value)
    assert "product_classes.fast.method" in text
    assert "'pooled'" in text and "'mean_of_ratios'" in text


def test_bad_model_lists_the_models(tmp_path):
    path = write(tmp_path, {"product_classes": {"fast": {"window": 8, "models": {"smooth": "prophet"}}}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert "product_classes.fast.models.smooth" in str(err.value)
    assert "'croston_sba'" in str(err.value)


def test_missing_product_classes(tmp_path):
    with pytest.raises(ConfigError) as err:
        load_config(write(tmp_path, {"calendar": {"period": "week"}}))
    assert "product_classes" in str(err.value) and "required" in str(err.value)


def test_even_hampel_window_is_refused(tmp_path):
    path = write(tmp_path, {**MINIMAL, "cleansing": {"outliers": {"window": 12}}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert "cleansing.outliers.window" in str(err.value) and "odd" in str(err.value)


def test_fallback_windows_must_grow(tmp_path):
    path = write(tmp_path, {"product_classes": {"fast": {"window": 26, "fallback_windows": [13]}}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert "product_classes.fast" in str(err.value) and "longer" in str(err.value)


def test_window_longer_than_history_names_the_class(tmp_path):
    config = load_config(write(tmp_path, {"product_classes": {"fast": {"window": 60}, "slow": {"window": 8}}}))
    config.check_windows_fit(60)  # exactly the history: fine
    with pytest.raises(ConfigError) as err:
        config.check_windows_fit(52)
    text = str(err.value)
    assert "product_classes.fast.window" in text and "52" in text and str(tmp_path) in text


def test_product_class_unknown_to_config(tmp_path):
    config = load_config(write(tmp_path, MINIMAL))
    with pytest.raises(ConfigError) as err:
        config.check_classes_known({"fast", "bulky"}, where="data/products.csv")
    text = str(err.value)
    assert "'bulky'" in text and "data/products.csv" in text and "'fast'" in text


def test_missing_file_and_bad_yaml(tmp_path):
    with pytest.raises(ConfigError, match="not found"):
        load_config(tmp_path / "absent.yaml")
    bad = tmp_path / "bad.yaml"
    bad.write_text("product_classes: [unclosed")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(bad)


def test_cycle_date_must_start_a_period():
    with pytest.raises(ConfigError, match="does not start a week"):
        resolve_cycle_date(dt.date(2026, 12, 2), None, "week", "planning.yaml")
    with pytest.raises(ConfigError, match="does not start a month"):
        resolve_cycle_date(dt.date(2026, 12, 2), None, "month", "planning.yaml")
    assert resolve_cycle_date(dt.date(2026, 11, 30), None, "week", "x") == dt.datetime(2026, 11, 30)


def test_backtest_section_defaults_and_auto_strategy(tmp_path):
    config = load_config(write(tmp_path, {"product_classes": {"fast": {"window": 8, "strategy": "auto"}}}))
    assert config.product_classes["fast"].strategy == "auto"
    bt = config.backtest
    assert (bt.origins, bt.horizon, bt.step) == (4, 13, 13)
    assert bt.strategies == ("top_down", "forecast_proportions", "bottom_up", "mint_shrink", "wls_var")
    # the earliest origin's horizon starts 13 + 3 x 13 = 52 periods before the cycle date
    from pipelines.stages.backtest_accuracy import origin_ordinals

    assert origin_ordinals(config, 100, 0)[0] == 100 - 52


def test_unknown_strategy_lists_the_strategies(tmp_path):
    path = write(tmp_path, {**MINIMAL, "backtest": {"strategies": ["top_down", "middle_out"]}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    text = str(err.value)
    assert "backtest.strategies" in text and "'mint_shrink'" in text and "'middle_out'" in text


def test_strategy_listed_twice_is_refused(tmp_path):
    path = write(tmp_path, {**MINIMAL, "backtest": {"strategies": ["bottom_up", "bottom_up"]}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert "backtest.strategies" in str(err.value) and "once" in str(err.value)


def test_bad_strategy_lists_auto_and_the_strategies(tmp_path):
    path = write(tmp_path, {"product_classes": {"fast": {"window": 8, "strategy": "region"}}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    text = str(err.value)
    assert "product_classes.fast.strategy" in text and "'auto'" in text and "'bottom_up'" in text


def test_a_class_may_fix_any_strategy(tmp_path):
    config = load_config(write(tmp_path, {"product_classes": {"fast": {"window": 8, "strategy": "mint_shrink"}}}))
    assert config.product_classes["fast"].strategy == "mint_shrink"
    assert config.product_classes["fast"].model_copy().strategy == "mint_shrink"


@pytest.mark.parametrize(
    ("grain", "strategy"), [("product_site", "top_down"), ("product_site_customer", "bottom_up"), ("auto", "auto")]
)
def test_forecast_grain_of_the_last_release_is_read_as_strategy_with_a_warning(tmp_path, grain, strategy):
    from pipelines.config import ConfigDeprecationWarning

    path = write(tmp_path, {"product_classes": {"fast": {"window": 8, "forecast_grain": grain}}})
    with pytest.warns(ConfigDeprecationWarning) as caught:
        config = load_config(path)
    assert config.product_classes["fast"].strategy == strategy
    message = str(caught[0].message)
    # the message names the file, the old key and the new key to write
    assert "planning.yaml" in message and "product_classes.fast.forecast_grain" in message
    assert f"strategy: {strategy}" in message


def test_share_method_forecast_proportions_is_read_as_children_forecast_with_a_warning(tmp_path):
    from pipelines.config import ConfigDeprecationWarning

    path = write(tmp_path, {"product_classes": {"fast": {"window": 8, "method": "forecast_proportions"}}})
    with pytest.warns(ConfigDeprecationWarning, match="method: children_forecast"):
        config = load_config(path)
    assert config.product_classes["fast"].method == "children_forecast"


def test_old_and_new_key_together_are_refused(tmp_path):
    path = write(tmp_path, {"product_classes": {"fast": {"window": 8, "forecast_grain": "auto", "strategy": "auto"}}})
    with pytest.raises(ConfigError, match="both strategy and forecast_grain"):
        load_config(path)


def test_the_current_config_reads_without_a_warning(recwarn):
    load_config("config/planning.yaml")
    assert not [w for w in recwarn if "renamed" in str(w.message)]


def test_n_jobs_is_read_and_zero_is_refused(tmp_path):
    assert parse_config(MINIMAL).models.n_jobs == -1  # every core unless the config says otherwise
    assert load_config(write(tmp_path, {**MINIMAL, "models": {"n_jobs": 1}})).models.n_jobs == 1
    with pytest.raises(ConfigError, match="models.n_jobs"):
        load_config(write(tmp_path, {**MINIMAL, "models": {"n_jobs": 0}}))


def test_last_releases_execution_n_jobs_is_read_as_models_n_jobs_with_a_warning(tmp_path):
    with pytest.warns(FutureWarning, match="execution.n_jobs is renamed models.n_jobs"):
        config = load_config(write(tmp_path, {**MINIMAL, "execution": {"n_jobs": 2}}))
    assert config.models.n_jobs == 2
    both = {**MINIMAL, "execution": {"n_jobs": 2}, "models": {"n_jobs": 1}}
    with pytest.raises(ConfigError, match="both models.n_jobs and execution.n_jobs"):
        load_config(write(tmp_path, both))


def test_models_engine_is_a_choice_and_address_needs_dask(tmp_path):
    config = load_config(write(tmp_path, {**MINIMAL, "models": {"engine": "dask", "workers": 3}}))
    assert (config.models.engine, config.models.workers, config.models.address) == ("dask", 3, None)
    with pytest.raises(ConfigError, match=r"models.engine.*'local', 'dask'|models.engine.*local.*dask"):
        load_config(write(tmp_path, {**MINIMAL, "models": {"engine": "ray"}}))
    with pytest.raises(ConfigError, match="only read with engine: dask"):
        load_config(write(tmp_path, {**MINIMAL, "models": {"address": "tcp://scheduler:8786"}}))
    with pytest.raises(ConfigError, match="models.workers"):
        load_config(write(tmp_path, {**MINIMAL, "models": {"engine": "dask", "workers": 0}}))


def test_tsb_parameters_are_validated(tmp_path):
    path = write(tmp_path, {"product_classes": {"fast": {"window": 8, "models": {"tsb": {"alpha_d": 1.5}}}}})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert "product_classes.fast.models.tsb.alpha_d" in str(err.value)


def test_horizon_backtest_and_schedule_follow_the_period():
    # weekly: 26 periods ahead (half a year), backtest 13 / 13, the schedule on Monday 06:00 UTC
    weekly = parse_config({"calendar": {"period": "week"}, **MINIMAL})
    assert weekly.calendar.horizon == 26 and (weekly.backtest.horizon, weekly.backtest.step) == (13, 13)
    assert weekly.calendar.schedule == "0 6 * * 1"
    # monthly: the coming year (a full season of 12), backtest 6 / 6, the first of the month 06:00 UTC
    monthly = parse_config({"calendar": {"period": "month"}, **MINIMAL})
    assert monthly.calendar.horizon == 12 and (monthly.backtest.horizon, monthly.backtest.step) == (6, 6)
    assert monthly.calendar.schedule == "0 6 1 * *"
    assert monthly.backtest.origins == weekly.backtest.origins == 4
    # no calendar section at all: the weekly defaults
    bare = parse_config(MINIMAL)
    assert (bare.calendar.period, bare.calendar.horizon, bare.backtest.horizon) == ("week", 26, 13)


def test_explicit_horizon_backtest_and_schedule_win_over_the_period_defaults():
    data = {
        "calendar": {"period": "month", "horizon": 18, "schedule": "30 5 2 * *"},
        "backtest": {"horizon": 3},
        **MINIMAL,
    }
    config = parse_config(data)
    assert config.calendar.horizon == 18 and config.calendar.schedule == "30 5 2 * *"
    assert (config.backtest.horizon, config.backtest.step) == (3, 6)  # the step left out still follows the month
    weekly = parse_config({"calendar": {"period": "week", "horizon": 52}, "backtest": {"step": 4}, **MINIMAL})
    assert weekly.calendar.horizon == 52 and (weekly.backtest.horizon, weekly.backtest.step) == (13, 4)


@pytest.mark.parametrize("cron", ["0 6 * *", "every monday", "0 6 * * MON", "0 6 * * 1 2026"])
def test_a_schedule_that_is_not_a_cron_string_names_the_key(tmp_path, cron):
    with pytest.raises(ConfigError, match=r"calendar\.schedule: .*not a cron string of 5 fields"):
        load_config(write(tmp_path, {"calendar": {"schedule": cron}, **MINIMAL}))
