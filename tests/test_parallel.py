"""The task runner: every task once, failures recorded as data."""

import math

import pytest

from trophoscape.errors import InputError
from trophoscape.parallel import run_tasks


def _square_or_fail(x):
    if x == 3:
        raise ValueError("three is not allowed")
    return x * x


@pytest.mark.parametrize("workers", [1, 2])
def test_every_task_once_and_failures_recorded(workers):
    seen = {}
    run_tasks(_square_or_fail, range(6), workers=workers, progress=False,
              on_result=lambda task, ok, value: seen.setdefault(task, (ok, value)))
    assert sorted(seen) == list(range(6))
    assert seen[3] == (False, "ValueError: three is not allowed")
    assert all(seen[k] == (True, k * k) for k in (0, 1, 2, 4, 5))


def test_workers_must_be_positive():
    with pytest.raises(InputError, match="--workers"):
        run_tasks(math.sqrt, [1.0, 4.0], workers=0, progress=False, on_result=print)
