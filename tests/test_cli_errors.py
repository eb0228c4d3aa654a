"""The command line read as a user: every bad input gives one paragraph on stderr naming the file,
the key path, what was expected and what was found, and exit code 2 -- never a traceback."""

from __future__ import annotations

from pathlib import Path

import pytest

from mpcproto.cli import main

GOOD = Path(__file__).parent.parent / "scenarios" / "caustic_blending.toml"
HEAD = '[scenario]\nname = "x"\nsample_time = 10.0\nduration = 600.0\n\n'


def bad_files(tmp: Path) -> dict[str, tuple[Path, list[str]]]:
    """name -> (path, fragments the message must hold)."""
    (tmp / "folder").mkdir(parents=True)
    (tmp / "folder" / "inside.toml").write_text(HEAD)
    files = {
        "syntax": (HEAD + '[plant\nmodel = "blending_tank"\n',
                   ["syntax.toml", "expected valid TOML", "line 6"]),
        "unknown_model": (HEAD + '[plant]\nmodel = "blending_tonk"\n',
                          ["unknown_model.toml", "key 'plant.model'", "'blending_tonk'",
                           "did you mean 'blending_tank'"]),
        "bad_key": (HEAD.replace("duration", "duraton") + '[plant]\nmodel = "blending_tank"\n',
                    ["bad_key.toml", "key 'scenario.duraton'", "expected one of the keys",
                     "found the unknown key 'duraton'"]),
        "huge_number": (HEAD.replace("600.0", "1" + "0" * 400) + '[plant]\nmodel = "blending_tank"\n',
                        ["huge_number.toml", "key 'scenario.duration'", "expected a finite number"]),
    }
    out = {k: (tmp / f"{k}.toml", frag) for k, (_, frag) in files.items()}
    for k, (text, _) in files.items():
        (tmp / f"{k}.toml").write_text(text)
    out["missing"] = (tmp / "missing.toml", ["missing.toml", "expected a readable scenario file",
                                             "found no file at this path"])
    out["directory"] = (tmp / "folder", ["folder", "expected a readable scenario file", "found a directory",
                                         "inside.toml"])
    return out


@pytest.mark.parametrize("command", [["linearize"], ["check"], ["run", "--out", "OUT"]])
def test_every_bad_file_gives_one_clear_paragraph_and_exit_2(command, tmp_path, capsys):
    for name, (path, fragments) in bad_files(tmp_path / command[0]).items():
        argv = [a if a != "OUT" else str(tmp_path / "out") for a in command] + [str(path)]
        code = main(argv)
        out, err = capsys.readouterr()
        assert code == 2, (name, err)
        assert "Traceback" not in err and err.count("\n") == 1, (name, err)   # one paragraph
        assert err.startswith(f"mpcproto {command[0]}: error: ")
        for frag in fragments:
            assert frag in err, (name, frag, err)


def test_run_refuses_an_out_path_that_is_a_file_and_an_unknown_case(tmp_path, capsys):
    f = tmp_path / "afile"
    f.write_text("")
    assert main(["run", str(GOOD), "--out", str(f)]) == 2
    err = capsys.readouterr().err
    assert "--out" in err and "expected a directory" in err and "found a file" in err
    assert main(["run", str(GOOD), "--out", str(tmp_path / "o"), "--case", "caustic_blending-s01"]) == 2
    err = capsys.readouterr().err
    assert "expected, for --case, the id of a case" in err and "found 'caustic_blending-s01'" in err
    assert "did you mean 'caustic_blending-s001'" in err


@pytest.mark.parametrize("replace, fragments", [
    ('tau_c = "fast"', ["key 'controllers.pid.tau_c'", "expected a finite number > 0", "found 'fast'"]),
    ("tau_c = { levle = 3.0 }", ["key 'controllers.pid.tau_c'", "expected one value or a table keyed by CV names", "found 'levle'", "did you mean 'level'"]),
    ("tau_c = { level = -3.0 }", ["key 'controllers.pid.tau_c.level'", "found -3.0"]),
    ('tau_c = 120.0\nlam = 5.0', ["key 'controllers.pid.lam'", "applies to rule imc", "the rule is 'simc'"]),
])
def test_pid_settings_errors_name_the_exact_key(replace, fragments, tmp_path, capsys):
    # the tau_c line of [controllers.pid] (the conventional scheme)
    text = GOOD.read_text().replace("tau_c = { level = 120.0, temperature = 120.0 }", replace)
    assert text != GOOD.read_text()
    p = tmp_path / "pid.toml"
    p.write_text(text)
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    assert err.count("controllers.pid") == 1, err            # the key path is not repeated
    for frag in fragments:
        assert frag in err, (frag, err)
