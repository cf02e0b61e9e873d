"""The suite's Hypothesis profile: property tests run without a per-example deadline."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st


def test_suite_profile_has_no_deadline() -> None:
    """tests/conftest.py loads a profile whose default deadline is None (not the 200 ms default)."""
    assert settings().deadline is None
    assert settings.get_profile("seqpipe").deadline is None


@given(st.integers())
def test_given_without_settings_inherits_no_deadline(value: int) -> None:
    """A @given test with no @settings of its own runs under the suite profile (no deadline)."""
    assert settings().deadline is None
    assert isinstance(value, int)
