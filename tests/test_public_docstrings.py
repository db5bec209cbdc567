"""Every public object of the library is documented in numpydoc form (checked with numpydoc.validate).

Checked for each public function, class and public method of cmbtools.maps, .spectrum, .physics,
.simulate and .exceptions: a docstring with a one-line summary (GL08, SS01), every parameter of the
signature documented with a description and nothing documented that the signature lacks (PR01,
PR02, PR07), and a Returns section for whatever returns a value (RT01).  numpydoc's own rules
(numpydoc doc/validation.rst); the codes are its names.
"""

from __future__ import annotations

import importlib
import inspect

import pytest

numpydoc_validate = pytest.importorskip("numpydoc.validate")

MODULES = ("cmbtools.maps", "cmbtools.spectrum", "cmbtools.physics", "cmbtools.simulate", "cmbtools.exceptions")
CHECKS = {
    "GL08": "no docstring",
    "SS01": "no one-line summary",
    "PR01": "parameters of the signature not documented",
    "PR02": "documented parameters not in the signature",
    "PR07": "a parameter without a description",
    "RT01": "no Returns section",
}


def _public_objects():
    for module_name in MODULES:
        module = importlib.import_module(module_name)
        for name in module.__all__:
            obj = getattr(module, name)
            if not (inspect.isclass(obj) or inspect.isfunction(obj)):
                continue  # constants
            yield f"{module_name}.{name}"
            if inspect.isclass(obj) and not issubclass(obj, BaseException):
                for attr, value in vars(obj).items():
                    if attr.startswith("_"):
                        continue
                    if inspect.isfunction(value) or isinstance(value, (staticmethod, classmethod)):
                        yield f"{module_name}.{name}.{attr}"


PUBLIC = sorted(set(_public_objects()))


def test_the_public_api_is_not_empty():
    # the walk above found the API (a broken walk would make the next test pass vacuously)
    assert len(PUBLIC) > 150
    assert "cmbtools.spectrum.SpectrumEstimator.estimate" in PUBLIC
    assert "cmbtools.exceptions.InputFileError" in PUBLIC


@pytest.mark.parametrize("name", PUBLIC)
def test_public_object_is_documented(name):
    result = numpydoc_validate.validate(name)
    problems = [f"{code} ({CHECKS[code]}): {message}" for code, message in result["errors"] if code in CHECKS]
    assert not problems, f"{name}:\n" + "\n".join(problems)
