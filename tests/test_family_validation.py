"""A family is checked at the boundary: every mistake gets an error naming the key and the fix."""

from __future__ import annotations

import pandas as pd
import pytest

from monitor import ConfigurationError, Family
from monitor.family import parse_family_mapping

GOOD = {"base": "load ~ temperature", "weather": "load ~ temperature + wind"}


def family(**changes):
    arguments = {"response": "load", "candidates": GOOD, "chosen": "base"} | changes
    return Family(**arguments)


def test_a_good_family_keeps_its_arguments_and_defaults():
    made = family()
    assert made.candidates is GOOD
    assert (made.spec.criterion, made.spec.alpha, made.spec.margin) == ("aic", 0.05, 2.0)
    assert made.spec.names == ("base", "weather")


@pytest.mark.parametrize(("changes", "where", "message"), [
    ({"chosen": "windy"}, "family.chosen",
     "'windy' is not one of the candidates.*'base', 'weather'"),
    ({"candidates": {"base": "load ~ temperature"}}, "family.candidates", "at least 2"),
    ({"candidates": GOOD | {"other": "demand ~ temperature"}}, "family.candidates.other",
     "models 'demand'.*response is 'load'"),
    ({"candidates": GOOD | {"again": "load ~ 1 + temperature"}}, "family.candidates.again",
     "'base' and 'again' are the same model"),
    ({"candidates": GOOD | {"swapped": "load ~ wind + temperature"}},
     "family.candidates.swapped", "'weather' and 'swapped' are the same model"),
    ({"candidates": GOOD | {"Base": "load ~ wind"}}, "family.candidates.Base",
     "'base' and 'Base' are the same apart from letter case"),
    ({"candidates": GOOD | {"broken": "load ~ temperature +"}}, "family.candidates.broken",
     "nothing after"),
    ({"candidates": GOOD | {"": "load ~ wind"}}, "family.candidates", "non-empty"),
    ({"criterion": "cp"}, "family.criterion", "unknown criterion 'cp'"),
    ({"alpha": 1.5}, "family.alpha", "between 0 and 1"),
    ({"alpha": True}, "family.alpha", "between 0 and 1"),
    ({"margin": -1.0}, "family.margin", "≥ 0"),
    ({"response": ""}, "family.response", "non-empty"),
], ids=["unknown-chosen", "one-candidate", "other-response", "same-terms", "same-terms-reordered",
        "case-duplicate", "bad-formula", "empty-name", "criterion", "alpha", "alpha-bool",
        "margin", "response"])
def test_bad_families_are_refused_with_the_key_and_the_fix(changes, where, message):
    with pytest.raises(ConfigurationError, match=message) as caught:
        family(**changes)
    assert caught.value.where == where
    assert caught.value.hint


def test_candidates_identical_after_encoding_are_refused_when_the_data_are_seen():
    # 'zone' has one level in these rows, so treatment coding gives it no column and
    # 'load ~ wind + zone' encodes to the same design as 'load ~ wind' (invented data)
    data = pd.DataFrame({"load": [1.0, 2.0, 3.5, 4.0, 5.5, 6.0],
                         "zone": ["a"] * 6,
                         "wind": [0.1, 0.4, 0.2, 0.8, 0.5, 0.3]})
    made = Family(response="load", chosen="plain", candidates={
        "plain": "load ~ wind", "zoned": "load ~ wind + zone", "small": "load ~ 1"})
    with pytest.raises(ConfigurationError, match="'plain' and 'zoned' are the same model after "
                       "encoding") as caught:
        made.evaluate(data)
    assert caught.value.where == "family.candidates.zoned"


def test_the_mapping_parser_names_the_full_key_path():
    mapping = {"response": "load", "chosen": "base", "candidates": GOOD, "criterium": "bic"}
    with pytest.raises(ConfigurationError, match="unknown key 'criterium'") as caught:
        parse_family_mapping(mapping, where="monitors.heat.family")
    assert caught.value.where == "monitors.heat.family.criterium"
    spec = parse_family_mapping(mapping, where="monitors.heat", ignore={"criterium"})
    assert spec.chosen == "base"
    with pytest.raises(ConfigurationError) as caught:
        parse_family_mapping({**mapping, "chosen": "x"}, where="monitors.heat.family",
                             ignore={"criterium"})
    assert caught.value.where == "monitors.heat.family.chosen"


@pytest.mark.parametrize(("mapping", "where", "message"), [
    ({"chosen": "base", "candidates": GOOD}, "f.response", "no 'response'"),
    ({"response": "load", "chosen": "base", "candidates": ["load ~ temperature"]},
     "f.candidates", "table of name"),
    ({"response": "load", "chosen": "base", "candidates": GOOD, "margin": "2"}, "f.margin",
     "must be a number"),
    ({"response": "load", "chosen": 3, "candidates": GOOD}, "f.chosen", "must be text"),
    ({"response": "load", "chosen": "base", "candidates": {"a": "load ~ x", "b": 5}},
     "f.candidates.b", "must be text"),
], ids=["missing-response", "list-candidates", "text-margin", "numeric-chosen", "formula-type"])
def test_mapping_type_errors_name_the_key(mapping, where, message):
    with pytest.raises(ConfigurationError, match=message) as caught:
        parse_family_mapping(mapping, where="f")
    assert caught.value.where == where


def test_family_file_problems_name_the_file(tmp_path):
    missing = tmp_path / "none.toml"
    with pytest.raises(ConfigurationError, match="no family file"):
        Family.from_toml(missing)
    duplicated = tmp_path / "twice.toml"
    duplicated.write_text('response = "load"\nchosen = "a"\n[candidates]\na = "load ~ x"\n'
                          'a = "load ~ z"\n', encoding="utf-8")
    with pytest.raises(ConfigurationError, match="not valid TOML") as caught:
        Family.from_toml(duplicated)
    assert caught.value.where == str(duplicated)
    wrong = tmp_path / "wrong.toml"
    wrong.write_text('response = "load"\nchosen = "c"\n[candidates]\na = "load ~ x"\n'
                     'b = "load ~ z"\n', encoding="utf-8")
    with pytest.raises(ConfigurationError) as caught:
        Family.from_toml(wrong)
    assert caught.value.where == f"{wrong}.chosen"


def test_family_file_round_trips_through_the_spec(tmp_path):
    path = tmp_path / "family.toml"
    path.write_text('response = "load"\nchosen = "weather"\ncriterion = "BIC"\nalpha = 0.01\n'
                    'margin = 4\n[candidates]\nbase = "load ~ temperature"\n'
                    'weather = "load ~ temperature + wind"\n', encoding="utf-8")
    spec = Family.from_toml(path).spec
    assert spec.to_dict() == {"response": "load", "chosen": "weather", "criterion": "bic",
                              "alpha": 0.01, "margin": 4.0, "candidates": {
                                  "base": "load ~ temperature",
                                  "weather": "load ~ temperature + wind"}}
    assert parse_family_mapping(spec.to_dict()) == spec
