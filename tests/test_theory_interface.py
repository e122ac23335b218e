"""The theory interface is declared, not guessed: inputs, required, one_of, derived names and labels,
settings with types and ranges — on every registered backend (imports no Boltzmann code)."""
from __future__ import annotations

import pytest

from infer.errors import UserError
from infer.theory import CODES, Setting, Theory, check_settings, theory_at_point, theory_class


@pytest.mark.parametrize("code", CODES)
def test_every_backend_declares_its_interface(code):
    cls = theory_class(code)
    assert cls.code == code
    assert cls.inputs == cls.required + cls.one_of + cls.optional and len(set(cls.inputs)) == len(cls.inputs)
    assert set(cls.derived_tex) >= set(cls.derived_names)
    assert all(isinstance(s, Setting) for s in cls.SETTINGS.values())
    assert set(cls.point_settings) <= set(cls.SETTINGS)
    defaults = cls.check_settings({}, "x.toml: [theory]")          # defaults are valid settings
    assert cls.check_settings(defaults, "x.toml: [theory]") == defaults


def test_a_backend_without_labels_is_refused_at_definition():
    with pytest.raises(TypeError, match="derived_tex"):
        type("Bad", (Theory,), {"derived_names": ("x",)})


def test_check_settings_names_file_and_key():
    with pytest.raises(UserError, match=r"^r\.toml: \[theory\]: unknown 'code'"):
        check_settings({"code": "nope"}, "r.toml: [theory]")
    with pytest.raises(UserError, match=r"^r\.toml: \[theory\]: unknown key 'speed'"):
        check_settings({"code": "templates", "speed": 1}, "r.toml: [theory]")
    assert check_settings({"code": "camb", "ell_margin": 400.0})["ell_margin"] == 400


def test_theory_at_point_checks_the_point_and_passes_fixed_inputs_as_settings():
    theory, inputs = theory_at_point({"code": "templates"}, {"a_1": 1, "a_2": 1, "a_3": 1, "a_4": 2}, 100)
    assert inputs == {"a_1": 1, "a_2": 1, "a_3": 1, "a_4": 2} and theory.ell_max == 100
    with pytest.raises(UserError, match=r"spec\.toml: \[fiducial\] lacks a_4"):
        theory_at_point({"code": "templates"}, {"a_1": 1, "a_2": 1, "a_3": 1}, 100,
                        point_where="spec.toml: [fiducial]")
    camb = theory_class("camb")
    point = {n: 0.1 for n in camb.required} | {"H0": 67.0, "theta_star_100": 1.04}
    with pytest.raises(UserError, match="exactly one of H0, theta_star_100"):
        theory_at_point({"code": "camb"}, point, 100)
    with pytest.raises(UserError, match=r"spec\.toml: \[fiducial\]: 'sum_mnu_eV'"):
        theory_at_point({"code": "camb"}, {n: 0.1 for n in camb.required} | {"H0": 67.0, "sum_mnu_eV": "light"}, 100,
                        point_where="spec.toml: [fiducial]")
