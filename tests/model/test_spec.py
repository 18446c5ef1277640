"""Catalog and Spec: names, options, validation wording, round trips."""

import pytest

import bayeslong as bl
from bayeslong.errors import SpecError

# The catalog's named special cases (docs/model-family.md) (docs/engine.md).
REQUIRED = {"alt", "linear-growth", "quadratic-growth", "free-growth", "free-growth-lag", "ar",
            "level-lag", "random-effects", "fixed-effects", "dual-change", "clpm", "ri-clpm",
            "bivariate-alt"}


def test_catalog_has_every_named_case():
    assert REQUIRED <= set(bl.catalog())


@pytest.mark.parametrize("name", sorted(REQUIRED))
def test_every_model_loads_with_defaults(name):
    spec = bl.model(name)
    assert spec.name == name
    assert set(spec.options) == {"initial", "lag", "residuals", "effects", "intercepts"}
    assert spec.description


def test_options_override_and_replace():
    spec = bl.model("alt", initial="endogenous", lag="time-varying")
    assert spec.options["initial"] == "endogenous" and spec.options["lag"] == "time-varying"
    back = spec.replace(initial="predetermined")
    assert back.options["initial"] == "predetermined"
    assert spec.options["initial"] == "endogenous"  # frozen: the original is unchanged
    assert bl.Spec.from_dict(spec.to_dict()) == spec


@pytest.mark.parametrize(
    "call, message",
    [
        (lambda: bl.model("alt2"), r"no model named 'alt2'; did you mean 'alt'\?"),
        (lambda: bl.model("alt", lag="yes"), r"`lag` must be one of constant, time-varying, none .*got 'yes'"),
        (lambda: bl.model("alt", intial="endogenous"), r"`option` must be one of .*did you mean 'initial'"),
        (lambda: bl.model("linear-growth", lag="constant"), r"`lag` must be one of none for model 'linear-growth'"),
        (lambda: bl.model("ar", initial="endogenous"), r"`initial` must be one of predetermined for model 'ar'"),
        (lambda: bl.model("alt").replace(colour="red"), r"Spec has no field 'colour'"),
    ],
    ids=["unknown-model", "bad-lag", "misspelt-option", "lag-not-allowed", "initial-not-allowed", "bad-field"],
)
def test_spec_errors_name_the_valid_choices(call, message):
    with pytest.raises(SpecError, match=message):
        call()


def test_user_model_file_same_format(tmp_path):
    path = tmp_path / "my-growth.toml"
    path.write_text('description = "level only, no lag"\nprocesses = 1\nfactors = ["level"]\n'
                    '[options]\nlag = "none"\n[allowed]\nlag = ["none"]\n')
    spec = bl.model(str(path))
    assert spec.name == "my-growth" and spec.factors == ("level",)


def test_user_model_file_unknown_key(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text('factor = ["level"]\n')
    with pytest.raises(SpecError, match="unknown key 'factor'; did you mean 'factors'"):
        bl.load_model(path)
