"""Every public name carries a numpy-style docstring (issue 12): functions say their
Parameters, Returns and Examples (the Examples run as doctests, see pyproject.toml); result
and error classes say their Attributes or Parameters."""
import inspect

import pytest

import gradcheck_kit as gk

PUBLIC = [(name, getattr(gk, name)) for name in gk.__all__]


def sections(obj) -> set:
    doc = inspect.getdoc(obj) or ""
    return {s for s in ("Parameters", "Returns", "Raises", "Examples", "Attributes")
            if f"{s}\n---" in doc}


@pytest.mark.parametrize("name, obj", [p for p in PUBLIC if not inspect.isclass(p[1])])
def test_public_functions_document_parameters_returns_and_examples(name, obj):
    assert {"Parameters", "Returns", "Examples"} <= sections(obj), name


@pytest.mark.parametrize("name, obj", [p for p in PUBLIC if inspect.isclass(p[1])])
def test_public_classes_document_their_fields(name, obj):
    found = sections(obj)
    assert found & {"Attributes", "Parameters", "Examples"}, name
