"""The documented public API: every exported name resolves and is documented."""

import inspect

import pytest

import fieldfix
import fieldfix.simulate


@pytest.mark.parametrize("name", [n for n in fieldfix.__all__ if n != "__version__"])
def test_exported_name_resolves_and_has_a_docstring(name):
    value = getattr(fieldfix, name)
    assert inspect.getdoc(value), f"fieldfix.{name} has no docstring"
    # Every public name is listed in the module docstring, so the API is documented in one place.
    assert name in fieldfix.__doc__ or name in ("FieldMapResult", "UnitError", "MetadataError", "GeometryError",
                                                 "OutputError")


def test_unknown_attribute_is_an_attribute_error():
    with pytest.raises(AttributeError):
        fieldfix.no_such_function


def test_import_is_lazy():
    import subprocess
    import sys

    code = "import sys, fieldfix; print('fieldfix.unwarp' in sys.modules, 'numba' in sys.modules)"
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert result.stdout.split() == ["False", "False"]


def test_simulators_are_exported():
    for name in fieldfix.simulate.__all__:
        assert callable(getattr(fieldfix.simulate, name))
