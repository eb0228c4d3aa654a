"""The malformed-scenario corpus: every file in tests/bad_scenarios/ must be refused with a message
that names the file, the key path, what was expected and what was found -- through the Python API
and through the command line (exit 2, no traceback).

Each corpus file lists the fragments its message must contain in ``# expect:`` header lines.
"""

import re
from pathlib import Path

import pytest

import mpcproto as mp
from mpcproto.cli import main
from mpcproto.scenario import check_scenario

CORPUS = sorted((Path(__file__).parent / "bad_scenarios").glob("*.toml"))


def expected_fragments(path: Path) -> list[str]:
    text = path.read_bytes().decode("utf-8", "replace")
    return re.findall(r"^# expect: (.*)$", text, re.M)


def test_corpus_is_large_enough():
    assert len(CORPUS) >= 25
    for p in CORPUS:
        assert expected_fragments(p), f"{p.name} declares no '# expect:' fragment"


def has_controllers(path: Path) -> bool:
    return "[controllers." in path.read_bytes().decode("utf-8", "replace")


@pytest.mark.parametrize("path", CORPUS, ids=lambda p: p.stem)
def test_loader_refuses_with_named_key(path):
    with pytest.raises(mp.ScenarioError) as ei:
        check_scenario(path, build_controllers=has_controllers(path))
    msg = str(ei.value)
    assert path.name in msg
    for frag in expected_fragments(path):
        assert frag in msg, f"{frag!r} not in {msg!r}"
    # one paragraph
    assert "\n" not in msg


@pytest.mark.parametrize("path", CORPUS, ids=lambda p: p.stem)
def test_cli_exit_2_without_traceback(path, capsys):
    args = ["check", str(path)] if has_controllers(path) else ["check", "--no-controllers", str(path)]
    code = main(args)
    out, err = capsys.readouterr()
    assert code == 2
    assert "Traceback" not in err and "Traceback" not in out
    assert path.name in err
    for frag in expected_fragments(path):
        assert frag in err
