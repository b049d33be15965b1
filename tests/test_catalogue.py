"""One metric catalogue: ``ledger.catalogue`` is a view of ``ledger.engine.metrics``.

Source: the product's own contract (issue 11, "one metric catalogue"; docs/metrics.md lists
the names); common practice, no outside source.  Nothing here is numeric.
"""

from __future__ import annotations

import pytest

from ledger import catalogue
from ledger.engine import metrics
from ledger.errors import IntegrityViolation, SpecError, UnknownMetricError


def _refusal(call, name):
    with pytest.raises(UnknownMetricError) as info:
        call(name)
    return type(info.value), str(info.value)


@pytest.mark.parametrize("name", ["phase_marg", "", "Phase_Margin", None])
def test_unknown_metric_is_one_error_with_one_message_from_every_entry(name):
    seen = {_refusal(call, name) for call in (
        metrics.get_metric, lambda n: metrics.resolve_settings(n, {}), catalogue.metric_def,
        catalogue.metric_unit, lambda n: catalogue.check_settings(n, {}))}
    assert len(seen) == 1, seen
    (cls, message), = seen
    assert cls is UnknownMetricError and issubclass(cls, SpecError)
    assert issubclass(cls, IntegrityViolation)
    assert message.startswith(f"unknown metric {name!r}; valid metrics: ")
    # the message lists every name of the catalogue, once each, on one line
    listed = message.split("valid metrics: ", 1)[1].split(", ")
    assert listed == list(metrics.METRICS) and "\n" not in message


def test_the_view_holds_the_catalogue_objects():
    assert catalogue.metric_names() == sorted(metrics.metric_names())
    for name in metrics.METRICS:
        assert catalogue.metric_def(name) is metrics.get_metric(name) is metrics.METRICS[name]
        assert catalogue.metric_unit(name) == metrics.METRICS[name].unit


def test_settings_are_checked_by_the_catalogue():
    with pytest.raises(SpecError, match="takes no setting 'settle'"):
        catalogue.check_settings("overshoot", {"settle": 0.1})
    assert catalogue.check_settings("overshoot", {"settling_band": 0.05}) == {"settling_band": 0.05}
