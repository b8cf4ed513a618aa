"""One vocabulary: the config, the schemas and `explain` take their allowed values from pipelines.vocabulary."""

import pytest

from pipelines import vocabulary as v
from pipelines import vocabulary_text as vt
from pipelines.config import parse_config
from pipelines.errors import ConfigError
from pipelines.schemas import LIFECYCLE_RULES, PERIOD_BASES, SHARE_METHODS, ZERO_REASONS
from pipelines.schemas_forecast import StatisticalForecast


@pytest.mark.parametrize(
    ("texts", "enum"),
    [
        (vt.SHARE_METHOD_TEXT, v.ShareMethod),
        (vt.LIFECYCLE_RULE_TEXT, v.LifecycleRule),
        (vt.ZERO_REASON_TEXT, v.ZeroReason),
        (vt.STRATEGY_TEXT, v.Strategy),
    ],
)
def test_explain_has_words_for_every_member(texts, enum):
    assert set(texts) == set(enum)
    assert all(text.strip() for text in texts.values())


def test_explain_describes_every_forecast_basis():
    assert set(vt.FORECAST_BASIS_TEXT) == set(v.FORECAST_BASES)


def test_the_schemas_allow_exactly_the_vocabulary():
    assert SHARE_METHODS == v.values(v.ShareMethod)
    assert LIFECYCLE_RULES == v.values(v.LifecycleRule)
    assert ZERO_REASONS == v.values(v.ZeroReason)
    assert set(PERIOD_BASES) == set(v.values(v.PERIOD_BASES))
    isin = StatisticalForecast.to_schema().columns["basis"].checks[0].statistics["allowed_values"]
    assert set(isin) == set(v.values(v.FORECAST_BASES))


@pytest.mark.parametrize("method", list(v.ShareMethod))
def test_the_config_takes_every_share_method_and_names_them_when_wrong(method):
    extra = {"smoothed": {"smoothing": 0.2}}.get(method, {})
    config = parse_config({"product_classes": {"a": {"window": 4, "method": method, **extra}}})
    assert config.product_classes["a"].method == method
    with pytest.raises(ConfigError) as err:
        parse_config({"product_classes": {"a": {"window": 4, "method": "weighted"}}})
    assert f"'{method}'" in str(err.value)


def test_every_word_is_text_in_the_config():
    config = parse_config({"product_classes": {"a": {"window": 4, "strategy": "bottom_up"}}})
    # the Enums validate, the config keeps plain text (frames and messages hold strings)
    assert type(config.product_classes["a"].strategy) is str and type(config.calendar.period) is str
