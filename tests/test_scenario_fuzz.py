"""Property: a scenario with any one value replaced by junk is either accepted or refused with a
ScenarioError (a message naming the file and key) -- never another exception."""

import copy
import tomllib
from pathlib import Path

from hypothesis import given, settings, strategies as st

import mpcproto as mp
from mpcproto.scenario import expand, parse_scenario

BASES = [tomllib.loads(p.read_text()) for p in sorted(Path("scenarios").glob("*.toml"))]
JUNK = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6),
                 st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8),
                 st.lists(st.integers(), max_size=3), st.just({}), st.just({"kind": "step"}),
                 st.just([{"a": 1}]), st.just({"a": {"b": []}}))


def _paths(d, pre=()):
    if isinstance(d, dict):
        for k, v in d.items():
            yield pre + (k,)
            yield from _paths(v, pre + (k,))
    elif isinstance(d, list):
        for i, v in enumerate(d):
            yield pre + (i,)
            yield from _paths(v, pre + (i,))


@settings(max_examples=300, deadline=None, derandomize=True)
@given(base=st.integers(0, len(BASES) - 1), where=st.integers(0, 10**6), junk=JUNK)
def test_one_junk_value_is_refused_cleanly(base, where, junk):
    raw = copy.deepcopy(BASES[base])
    paths = list(_paths(raw))
    p = paths[where % len(paths)]
    cur = raw
    for k in p[:-1]:
        cur = cur[k]
    if junk is None:
        del cur[p[-1]]
    else:
        cur[p[-1]] = junk
    try:
        expand(parse_scenario(raw, file="fuzz.toml"), check=True)
    except mp.ScenarioError as e:
        assert str(e).startswith("fuzz.toml")
