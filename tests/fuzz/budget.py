"""Per-test hypothesis settings drawn from the fuzz profiles (tests/fuzz/conftest.py)."""
from __future__ import annotations

from hypothesis import settings

PROFILES = ("ci", "campaign")


def fuzz_settings(share: float, **extra) -> settings:
    """`share` of the active fuzz profile's max_examples (at least 1).

    The active profile is the one --hypothesis-profile loaded, or "ci" when it loaded none
    of ours; other tests' hypothesis settings are never touched.
    """
    name = settings.get_current_profile_name()
    base = settings.get_profile(name if name in PROFILES else "ci")
    return settings(base, max_examples=max(1, round(base.max_examples * share)), **extra)
