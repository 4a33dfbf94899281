"""Hypothesis profiles of the fuzz tests (registered here, not in the shared tests/conftest.py).

  ci        the default: several hundred cases over all fuzz tests, a few minutes on 2 cores;
            derandomized and without the example database, so CI sees the same cases every
            run (unless --hypothesis-seed); no shrinking (a graph case costs a C build, and
            shrinking one can take minutes): a failure is reported as drawn
  campaign  long (make fuzz): many more cases per test, fresh random cases every run,
            failures shrunk and kept in the example database (.hypothesis/)

Each fuzz test takes a share of its profile's max_examples (tests/fuzz/budget.py), so an
expensive test (compile + C build per case) runs fewer cases than a cheap one.

Replaying a failure: hypothesis prints the falsifying example and a @reproduce_failure blob.
A campaign without --hypothesis-seed picks a seed, prints it in the session header, and
`--hypothesis-seed=S` replays the same cases (with any profile: a given seed turns
derandomize off, so the seed decides).
"""
from __future__ import annotations

import random

import pytest
from hypothesis import HealthCheck, Phase, settings

SLOW_OK = [HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.filter_too_much]


def register(derandomize_ci: bool) -> None:
    settings.register_profile("ci", max_examples=100, deadline=None, print_blob=True,
                              derandomize=derandomize_ci, database=None,
                              phases=[Phase.explicit, Phase.generate],
                              suppress_health_check=SLOW_OK)
    settings.register_profile("campaign", max_examples=2000, deadline=None, print_blob=True,
                              derandomize=False, suppress_health_check=SLOW_OK)


register(derandomize_ci=True)


@pytest.hookimpl(tryfirst=True)
def pytest_configure(config):
    """Before hypothesis' own plugin reads the options: settle the seed of this session."""
    seed = config.getoption("--hypothesis-seed", None)
    if seed is not None:
        register(derandomize_ci=False)
    elif config.getoption("--hypothesis-profile", None) == "campaign":
        config.option.hypothesis_seed = str(random.SystemRandom().randrange(2**32))


def pytest_terminal_summary(terminalreporter, config):
    """Last lines of the run (shown with -q too): the profile and how to replay it."""
    seed = config.getoption("--hypothesis-seed", None)
    profile = config.getoption("--hypothesis-profile", None) or "ci"
    how = f"seed {seed}; replay with --hypothesis-profile={profile} --hypothesis-seed={seed}" \
        if seed is not None else "derandomized (the same cases every run)"
    terminalreporter.write_line(f"tinygen fuzz: profile {profile}, {how}")


# -- progress (make fuzz on a terminal): each property test's cases counted on one line ------

_PROGRESS: dict = {}


def pytest_collection_modifyitems(config, items):
    """Count every case a property test runs, on stderr when it is a terminal (pytest
    captures sys.stderr, so the real one is used; nothing is shown in logs or CI)."""
    import sys

    from tinygen.progress import Progress
    stream = sys.__stderr__
    if stream is None or not stream.isatty():
        return
    for item in items:
        fn = getattr(item, "obj", None)
        hyp = getattr(fn, "hypothesis", None)
        if hyp is None or fn in _PROGRESS:
            continue
        progress = Progress(f"fuzz {fn.__name__}: cases", stream=stream)
        _PROGRESS[fn] = progress
        inner, count = hyp.inner_test, [0]

        def counted(*args, _inner=inner, _progress=progress, _count=count, **kwargs):
            _count[0] += 1
            _progress.step(_count[0])
            return _inner(*args, **kwargs)
        hyp.inner_test = counted  # hypothesis' documented hook for wrapping the test body


def pytest_runtest_teardown(item):
    progress = _PROGRESS.get(getattr(item, "obj", None))
    if progress is not None:
        progress.done()
