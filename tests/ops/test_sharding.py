"""Rendezvous sharding of charts and the shard taken from the environment."""

from __future__ import annotations

import hashlib
import json
import math
import os
import subprocess
import sys
from collections import Counter

import pytest

from monitor.sharding import MAX_SHARDS, owner, owns, shard_client_id, shard_from_environment
from monitor.spc import ConfigError

CHART_IDS = [f"plant/line-{i % 17}/press-{i}/thickness" for i in range(10_000)]


def independent_owner(chart_id: str, shards: int) -> int:
    """The owner recomputed here from its definition: highest 64-bit BLAKE2b of "<shard>:<chart id>"."""
    weights = [
        int.from_bytes(hashlib.blake2b(f"{s}:{chart_id}".encode(), digest_size=8).digest(), "big")
        for s in range(shards)
    ]
    return weights.index(max(weights))


def test_every_chart_is_owned_by_exactly_one_shard():
    """For 1 to 6 shards, each chart has one owner in range and owns() is true for it alone."""
    for shards in range(1, 7):
        for chart_id in CHART_IDS[:500]:
            holders = [i for i in range(shards) if owns(chart_id, i, shards)]
            assert holders == [owner(chart_id, shards)]


def test_owners_match_the_definition_computed_independently_with_hashlib():
    """owner() agrees with an independent BLAKE2b computation for 2,000 charts and 1 to 8 shards."""
    for shards in range(1, 9):
        for chart_id in CHART_IDS[:2000:7]:
            assert owner(chart_id, shards) == independent_owner(chart_id, shards)


# Computed once, outside this project, with hashlib.blake2b(f"{shard}:{chart}".encode(), digest_size=8)
# for 2, 3, 4 and 5 shards. A change of hash or key format would move charts between deployed shards.
FIXED_OWNERS = {
    "press-1/thickness": (0, 0, 0, 4),
    "kiln-1/zone-3-temperature": (0, 0, 0, 0),
    "press-2/thickness": (1, 1, 1, 1),
    "glaze-1/coat-weight": (0, 2, 3, 3),
}


def test_fixed_owners_do_not_change_between_releases():
    """Owners of four charts for 2 to 5 shards equal the values written down once from hashlib."""
    for chart_id, owners in FIXED_OWNERS.items():
        assert tuple(owner(chart_id, shards) for shards in (2, 3, 4, 5)) == owners


def test_owners_are_the_same_in_processes_with_different_hash_seeds():
    """Two interpreters with different PYTHONHASHSEED values give the same owners (no salted hash())."""
    code = (
        "import json, sys\n"
        "from monitor.sharding import owner\n"
        "ids = json.loads(sys.stdin.read())\n"
        "print(json.dumps([owner(c, 5) for c in ids]))\n"
    )
    ids = CHART_IDS[:300]
    results = []
    for seed in ("1", "2"):
        env = {**os.environ, "PYTHONHASHSEED": seed}
        done = subprocess.run(
            [sys.executable, "-c", code],
            input=json.dumps(ids),
            capture_output=True,
            text=True,
            check=True,
            env=env,
            timeout=120,
        )
        results.append(json.loads(done.stdout))
    assert results[0] == results[1] == [owner(c, 5) for c in ids]


@pytest.mark.parametrize("shards", [2, 3, 4, 7])
def test_ten_thousand_charts_spread_within_a_few_percent(shards: int):
    """Each shard's count is within four binomial standard deviations of 10,000/n (under 10 % for n <= 7)."""
    total = len(CHART_IDS)
    counts = Counter(owner(c, shards) for c in CHART_IDS)
    expected = total / shards
    allowed = 4 * math.sqrt(total * (1 / shards) * (1 - 1 / shards))
    assert allowed / expected < 0.10
    assert set(counts) == set(range(shards))
    for count in counts.values():
        assert abs(count - expected) <= allowed


@pytest.mark.parametrize("shards", [1, 2, 3, 5, 8])
def test_adding_a_shard_moves_only_about_one_in_n_plus_one_charts_and_only_to_it(shards: int):
    """Going from n to n+1 shards moves about 1/(n+1) of the charts, every one of them to the new shard."""
    moved = [c for c in CHART_IDS if owner(c, shards) != owner(c, shards + 1)]
    assert all(owner(c, shards + 1) == shards for c in moved)
    share = len(moved) / len(CHART_IDS)
    assert abs(share - 1 / (shards + 1)) < 0.02


def test_one_shard_owns_everything():
    """With a single shard every chart belongs to shard 0."""
    assert {owner(c, 1) for c in CHART_IDS[:1000]} == {0}


@pytest.mark.parametrize("shards", [0, -1, MAX_SHARDS + 1])
def test_a_shard_count_out_of_range_is_a_config_error(shards: int):
    """owner() refuses 0, negative and too many shards with a ConfigError naming the range."""
    with pytest.raises(ConfigError, match=f"from 1 to {MAX_SHARDS}"):
        owner("press-1/thickness", shards)


# ---------------------------------------------------------------- environment


@pytest.mark.parametrize(
    ("environ", "expected"),
    [
        ({}, None),
        ({"MONITOR_SHARD_INDEX": "1", "MONITOR_SHARD_COUNT": "3"}, (1, 3)),
        ({"MONITOR_SHARD_INDEX": " 0 ", "MONITOR_SHARD_COUNT": "1"}, (0, 1)),
        ({"MONITOR_POD_NAME": "line-monitor-2", "MONITOR_SHARD_COUNT": "3"}, (2, 3)),
        ({"MONITOR_POD_NAME": "line-7-monitor-0", "MONITOR_SHARD_COUNT": "2"}, (0, 2)),
        (
            {"MONITOR_SHARD_INDEX": "", "MONITOR_POD_NAME": "line-monitor-1", "MONITOR_SHARD_COUNT": "3"},
            (1, 3),
        ),
        (
            {"MONITOR_SHARD_INDEX": "2", "MONITOR_POD_NAME": "line-monitor-0", "MONITOR_SHARD_COUNT": "3"},
            (2, 3),
        ),
        (
            {"MONITOR_SHARD_INDEX": "3", "MONITOR_SHARD_COUNT": "3", "MONITOR_SHARD_ORDINAL_START": "1"},
            (2, 3),
        ),
    ],
)
def test_the_shard_is_read_from_the_documented_variables(
    environ: dict[str, str], expected: tuple[int, int] | None
):
    """Index and count, the pod-name fallback (when the index is unset or empty), and the ordinal start."""
    assert shard_from_environment(environ) == expected


@pytest.mark.parametrize(
    ("environ", "message"),
    [
        (
            {"MONITOR_SHARD_INDEX": "one", "MONITOR_SHARD_COUNT": "3"},
            "MONITOR_SHARD_INDEX must be a whole number",
        ),
        (
            {"MONITOR_SHARD_INDEX": "-1", "MONITOR_SHARD_COUNT": "3"},
            "MONITOR_SHARD_INDEX must be a whole number",
        ),
        (
            {"MONITOR_SHARD_INDEX": "1", "MONITOR_SHARD_COUNT": "3.0"},
            "MONITOR_SHARD_COUNT must be a whole number",
        ),
        ({"MONITOR_SHARD_INDEX": "3", "MONITOR_SHARD_COUNT": "3"}, "MONITOR_SHARD_COUNT is 3"),
        ({"MONITOR_SHARD_INDEX": "0", "MONITOR_SHARD_COUNT": "0"}, "from 1 to 1024"),
        ({"MONITOR_SHARD_INDEX": "0", "MONITOR_SHARD_COUNT": "5000"}, "from 1 to 1024"),
        ({"MONITOR_SHARD_COUNT": "3"}, "set MONITOR_SHARD_INDEX"),
        ({"MONITOR_SHARD_INDEX": "1"}, "MONITOR_SHARD_COUNT is not"),
        ({"MONITOR_POD_NAME": "line-monitor-1"}, "MONITOR_SHARD_COUNT is not"),
        ({"MONITOR_POD_NAME": "line-monitor", "MONITOR_SHARD_COUNT": "3"}, "'<name>-<ordinal>'"),
        (
            {"MONITOR_SHARD_INDEX": "0", "MONITOR_SHARD_COUNT": "3", "MONITOR_SHARD_ORDINAL_START": "1"},
            "below MONITOR_SHARD_ORDINAL_START",
        ),
    ],
)
def test_bad_shard_variables_are_config_errors_that_name_the_variable(environ: dict[str, str], message: str):
    """Non-numbers, an index past the count, a count of 0, and half-set variables each raise a clear ConfigError."""
    with pytest.raises(ConfigError, match=message.replace(".", r"\.")):
        shard_from_environment(environ)


def test_each_shard_gets_its_own_client_id():
    """The shard is appended to the client id, and an id that would grow past 64 characters is refused."""
    assert shard_client_id("line-monitor", 0) == "line-monitor-0"
    with pytest.raises(ConfigError, match="shorten it"):
        shard_client_id("x" * 63, 12)
