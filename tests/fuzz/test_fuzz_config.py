"""Fuzzing the mapping file and the rules file of ``tracechain check``.

Generated valid files (names written quoted, so YAML 1.1 resolution must not change them:
YAML 1.1 spec, section 7.3.2; the tricky plain forms no/on/1.0/~ are common practice)
must read as written, with Windows line ends or a byte order mark too; damaged ones
(``fuzzkit._yaml_mutation``: anchors, tags, deep nesting, huge numbers, invalid UTF-8, byte
flips, ...) must raise nothing but a ``ConfigError``. Seeded; small enough for CI.
"""

from __future__ import annotations

import os
import random

import pytest

pytest.importorskip("hypothesis")
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

import fuzzkit as fk  # noqa: E402

SCALE = float(os.environ.get("TRACECHAIN_FUZZ_EXAMPLES", "1"))
_SET = settings(derandomize=True, deadline=None, max_examples=max(1, int(60 * SCALE)), database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])


@pytest.mark.parametrize("kind", ["mapping", "rules"])
@pytest.mark.parametrize("damage", [False, True], ids=["valid", "damaged"])
@_SET
@given(seed=st.integers(0, 2**32 - 1))
def test_config_files(kind, damage, seed, tmp_path):
    bugs, wrong = fk.check_config(kind, random.Random(seed), str(tmp_path), damage)
    assert not bugs, "\n".join(bugs)
    assert not wrong, "\n".join(wrong)


def test_generated_mapping_is_not_trivial():
    """The valid files hold names YAML 1.1 would turn into booleans, numbers or null."""
    names = set()
    for seed in range(30):
        case = fk.gen_mapping(random.Random(seed))
        names.update(case.renames)
        names.update(case.renames.values())
    assert {"no", "on", "1.0", "~", "null"} & names
