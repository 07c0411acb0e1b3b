"""Exit codes by kind, over every command: 2 when the command line is wrong (an option the command does
not take, a path it names that is not there, an output where mapstore never writes), 1 when the command
was right but could not be done (a damaged store or file), each said in one line."""

from __future__ import annotations

import shutil

import pytest

from mapstore.cli import cli, main


def _cases(ok_store, bad_store, tmp):
    """(argv, exit code) per command: a usage mistake, and where one exists, a failure that is not one."""
    missing = str(tmp / "not-there")
    garbage = tmp / "garbage.json"
    garbage.write_text('{"x": 1')
    empty = tmp / "empty"
    empty.mkdir(exist_ok=True)
    s, b = str(ok_store), str(bad_store)
    return {
        "index": [([missing, "--store", str(tmp / "s1")], 2), ([str(empty), "--store", str(tmp / "s2")], 1)],
        "features": [(["--store", missing], 2), (["--store", b], 1)],
        "labels": [(["--store", s, "--vocab", missing], 2), (["--store", b, "--vocab", str(garbage)], 1)],
        "export": [(["--store", missing, "--out", str(tmp / "o1")], 2), (["--store", b, "--out", str(tmp / "o2")], 1)],
        "verify": [([missing], 2), ([str(garbage)], 1)],
        "rebuild": [([missing, "--sources", str(empty), "--out", str(tmp / "o3")], 2),
                    ([str(garbage), "--sources", str(empty), "--out", str(tmp / "o4")], 1)],
        "check": [(["--store", s, "--html", str(tmp / "no" / "r.html")], 2), (["--store", b], 1),
                  (["--store", s, "--html", str(ok_store / "inside.html")], 2)],
        "sql": [(["--store", missing, "SELECT 1"], 2), (["--store", b, "SELECT 1"], 1)],
        "similar": [(["--store", missing, "m"], 2), (["--store", b, "m"], 1)],
        "pool": [(["--store", missing, "--out", str(tmp / "o5")], 2), (["--store", b, "--out", str(tmp / "o6")], 1)],
        "parcels": [(["--store", missing, "--atlas", str(garbage)], 2), (["--store", b, "--atlas", str(garbage)], 1)],
        "mesh": [([missing, "--out", str(tmp / "m.json")], 2)],
        "schema": [(["no-such-schema"], 2)],
        "demo": [([str(ok_store)], 2)],
    }


def test_every_command_exits_by_kind_in_one_line(demo_store, tmp_path, capsys):
    ok = tmp_path / "store"
    shutil.copytree(demo_store, ok)
    bad = tmp_path / "damaged"
    shutil.copytree(demo_store, bad)
    (bad / "HEAD").write_text("not json")
    cases = _cases(ok, bad, tmp_path)
    assert set(cases) == set(cli.commands), "every command has its row"
    for command, rows in cases.items():
        # an option no command takes: a usage mistake, said with the command and where its help is
        rows = rows + [(["--no-such-option"], 2)]
        for argv, code in rows:
            got = main([command, *argv])
            err = capsys.readouterr().err.strip()
            assert got == code, f"mapstore {command} {' '.join(argv)}: exit {got}, expected {code}: {err}"
            assert len(err.splitlines()) == 1 and err.startswith("error: "), (command, argv, err)
            assert "Traceback" not in err and "Usage:" not in err


@pytest.mark.parametrize("argv, words", [
    (["export", "--group-by", "scanner"], "--group-by 'scanner'"),
    (["export", "--min-coverage", "0.5", "--y-from", "nowhere"], "--y-from"),
])
def test_messages_on_the_command_line_name_options_not_parameters(example_store, tmp_path, capsys, argv, words):
    code = main([argv[0], "--store", str(example_store), "--out", str(tmp_path / "o"), *argv[1:]])
    err = capsys.readouterr().err
    assert code == 2 and words in err, err
    assert "group_by" not in err and "y_from" not in err and "min_coverage" not in err, err
