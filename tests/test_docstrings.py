"""Every public name documents itself: the package's functions name each parameter in their
docstring and say what they return and raise (the Google docstring sections, as the
Napoleon extension of Sphinx reads them), and every public method and property of the report
objects has a docstring. docs/api.md lists every public function."""

from __future__ import annotations

import inspect
from pathlib import Path

import pytest

import steelyard
from steelyard.comparison.report import CompareReport
from steelyard.report import Report
from steelyard.run_timeline.result import Timeline

FUNCTIONS = [getattr(steelyard, name) for name in steelyard.__all__ if callable(getattr(steelyard, name))]


@pytest.mark.parametrize("function", FUNCTIONS, ids=lambda f: f.__name__)
def test_functions_document_every_parameter(function: object) -> None:
    doc = inspect.getdoc(function) or ""
    assert "Returns:" in doc and "Raises:" in doc, function
    for name in inspect.signature(function).parameters:  # type: ignore[arg-type]
        assert f"{name}:" in doc, f"{function}: parameter {name} is not documented"


@pytest.mark.parametrize("cls", [Report, CompareReport, Timeline], ids=lambda c: c.__name__)
def test_report_objects_document_their_public_members(cls: type) -> None:
    assert inspect.getdoc(cls)
    for name, member in vars(cls).items():
        if name.startswith("_") or not (callable(member) or isinstance(member, property)):
            continue
        target = member.fget if isinstance(member, property) else member
        assert inspect.getdoc(target), f"{cls.__name__}.{name} has no docstring"


def test_the_api_page_lists_every_public_function() -> None:
    page = (Path(__file__).resolve().parents[1] / "docs" / "api.md").read_text(encoding="utf-8")
    for function in FUNCTIONS:
        assert f"steelyard.{function.__name__}(" in page
    for member in ("render(", "to_json(", "passed", "exit_code", "findings"):
        assert member in page
