"""The one threshold policy (formread/form/thresholds.py) and layout edits that keep the clerk's comments."""

import pytest
from fakes import field_spec, layout_of

from formread.errors import LayoutError, ParameterError
from formread.form.edit import set_form_value
from formread.form.layout import load_layout
from formread.form.thresholds import (
    DEFAULT_TARGET,
    DEFAULT_THRESHOLD,
    check_threshold,
    form_threshold,
    resolve_thresholds,
)


def _lay(form_threshold=0.9, a=None, b=None, target=None):
    return layout_of([field_spec("a", threshold=a), field_spec("b", threshold=b)], threshold=form_threshold)


def test_precedence_explicit_field_form_default():
    assert {k: (v.value, v.source) for k, v in resolve_thresholds(_lay(0.8, a=0.95)).items()} == {
        "a": (0.95, "field"), "b": (0.8, "form")}
    assert {k: (v.value, v.source) for k, v in resolve_thresholds(_lay(0.8, a=0.95), explicit=0.7).items()} == {
        "a": (0.7, "explicit"), "b": (0.7, "explicit")}
    assert resolve_thresholds(_lay(None))["a"].value == DEFAULT_THRESHOLD
    assert resolve_thresholds(_lay(None))["a"].source == "default"


def test_a_target_becomes_a_threshold_through_the_bundles_fitted_decisions():
    asked = []

    def fitted(target, name):
        asked.append((target, name))
        return 0.5 if name is None else 0.6

    lay = _lay(None)
    t = resolve_thresholds(lay, fitted=fitted)
    assert (t["a"].value, t["a"].source, t["a"].target) == (0.5, "fitted default", DEFAULT_TARGET)
    assert form_threshold(lay, fitted=lambda target, name: None).source == "default"   # nothing fitted meets it
    assert form_threshold(_lay(0.85), fitted=fitted).value == 0.85                     # the form's threshold wins


def test_one_valid_range():
    for bad in (0, -0.1, 1.5, float("nan"), float("inf"), "0.9", True, None):
        with pytest.raises(ParameterError):
            check_threshold(bad)
    assert check_threshold(1) == 1.0
    with pytest.raises(ParameterError):
        resolve_thresholds(_lay(), explicit=0.0)


def test_set_form_value_keeps_comments_and_order(tmp_path):
    text = ('# our meter card, kept by the office\n[form]  # the page\nname = "Card"\nwidth_mm = 210.0\n'
            'height_mm = 297.0\nthreshold = 0.9   # old value\n\n# corner squares\n'
            + "".join(f"[[marks]]\nx = {x}\ny = {y}\nsize = 6\n" for x, y in ((10, 10), (200, 10), (10, 287)))
            + '[[fields]]  # the only field\nname = "n"\nkind = "open"\nx = 30\ny = 30\nw = 40\nh = 10\n'
            'max_digits = 3\n')
    p = tmp_path / "card.toml"
    p.write_text(text)
    lay = set_form_value(p, "threshold", 0.8765, comment="chosen by formread tune")
    new = p.read_text()
    assert lay.threshold == 0.8765 and load_layout(p).threshold == 0.8765
    for kept in ("# our meter card, kept by the office", "[form]  # the page", "# corner squares",
                 "[[fields]]  # the only field"):
        assert kept in new
    assert "threshold = 0.8765 # chosen by formread tune" in new
    assert new.replace("threshold = 0.8765 # chosen by formread tune", "threshold = 0.9   # old value") == text
    # an edit that would break the layout leaves the file as it was
    with pytest.raises(LayoutError, match="'threshold' must be"):
        set_form_value(p, "threshold", 1.5)
    assert p.read_text() == new
