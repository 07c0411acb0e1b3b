"""The CLI is a thin layer: exit codes, formats, no tracebacks for user errors."""

from __future__ import annotations

import json
from pathlib import Path

import pyarrow.parquet as pq
from click.testing import CliRunner

from mapstore.cli import cli, main

from ..conftest import make_derivative, write_map


def test_sql_formats(demo_store, tmp_path):
    runner = CliRunner()
    q = "SELECT map_id, stat, shape FROM maps ORDER BY map_id LIMIT 3"
    r = runner.invoke(cli, ["sql", "--store", str(demo_store), q])
    assert r.exit_code == 0 and "map_id" in r.output and "(3 rows)" in r.output
    r = runner.invoke(cli, ["sql", "--store", str(demo_store), q, "--format", "json"])
    rows = json.loads(r.output)
    assert len(rows) == 3 and isinstance(rows[0]["shape"], list)
    r = runner.invoke(cli, ["sql", "--store", str(demo_store), q, "--format", "csv"])
    assert r.output.splitlines()[0] == '"map_id","stat","shape"'
    out = tmp_path / "x.parquet"
    r = runner.invoke(cli, ["sql", "--store", str(demo_store), q, "--format", "parquet", "--out", str(out)])
    assert r.exit_code == 0 and pq.read_table(out).num_rows == 3


def test_user_errors_exit_cleanly(tmp_path, capsys):
    assert main(["sql", "--store", str(tmp_path / "nothing"), "SELECT 1"]) == 2  # the path named is wrong
    err = capsys.readouterr().err
    assert "no such store" in err and "Traceback" not in err
    assert main(["index", str(tmp_path), "--store", str(tmp_path / "s"), "--rules", str(tmp_path / "no.json")]) == 1
    assert "file not found" in capsys.readouterr().err
    assert main(["sql"]) == 2  # usage error


def test_index_command(demo_tree, tmp_path):
    r = CliRunner().invoke(cli, ["index", str(demo_tree), "--store", str(tmp_path / "s"),
                                 "--rules", str(demo_tree / "name-rules.json"), "--jobs", "1"])
    assert r.exit_code == 0, r.output
    assert "maps:" in r.output and "problems:" in r.output


def test_features_labels_export_verify_commands(demo_store, demo_tree, tmp_path):
    import shutil

    store = tmp_path / "store"
    shutil.copytree(demo_store, store)
    runner = CliRunner()
    r = runner.invoke(cli, ["features", "--store", str(store), "--grid", "MNI152-3mm", "--name", "three",
                            "--jobs", "1"])
    assert r.exit_code == 0, r.output
    assert "feature set 'three'" in r.output and "resampling paths" in r.output
    r = runner.invoke(cli, ["features", "--store", str(store), "--list"])
    assert "three" in r.output and "MNI152-3mm" in r.output
    r = runner.invoke(cli, ["labels", "--store", str(store), "--vocab", str(demo_tree / "concepts.json")])
    assert r.exit_code == 0 and "maps labelled" in r.output
    out = tmp_path / "exp"
    assert main(["export", "--store", str(store), "--features", "three", "--out", str(out), "--concept",
                 "reading", "--concept", "arithmetic", "--scheme", "group-kfold:2"]) == 0
    assert main(["verify", str(out / "manifest.json")]) == 0
    (out / "y.npy").write_bytes(b"changed")
    assert main(["verify", str(out)]) == 3  # a change found: 3; a failure to run: 1


def test_bad_vocabulary_message_from_cli(demo_store, tmp_path, capsys):
    vocab = tmp_path / "v.yaml"
    vocab.write_text("concepts:\n  a: {}\nrules:\n  - task: x\n    concepts: [b]\n")
    assert main(["labels", "--store", str(demo_store), "--vocab", str(vocab)]) == 1
    err = capsys.readouterr().err
    assert "rules[0].concepts[0] (line 5): unknown concept 'b'" in err and "Traceback" not in err


def test_ordinary_mistakes_are_one_line_without_traceback(demo_store, tmp_path, capsys):
    grid = tmp_path / "grid.json"
    grid.write_text('{"affine": [[2, 0, 0, 0], [0, 2, 0, 0], [0, 0, 2, 0], [0, 0, 0, 1]]}')
    src = make_derivative(tmp_path / "src")
    write_map(src / "sub-01" / "sub-01_task-go_contrast-a_stat-t_statmap.nii.gz")
    empty = tmp_path / "empty"
    empty.mkdir()
    (empty / "store.json").write_text('{"format": "mapstore-store", "version": 2}')
    old = tmp_path / "old"  # a store of the format before every part carried the current columns
    old.mkdir()
    (old / "store.json").write_text('{"format": "mapstore-store", "version": 1}')
    cases = [
        (["sql", "--store", str(old), "SELECT 1"], 1,
         f"error: {old}: written by an older mapstore (store format 1; this one reads format 2); index the "
         "datasets again into a new folder"),
        (["features", "--store", str(demo_store), "--grid", str(grid)], 2,
         f'error: grid spec {grid}: no shape; expected JSON {{"shape": [x, y, z], "affine": [[...4x4...]]}}'),
        (["sql", "--store", str(demo_store), "--out", str(tmp_path / "no" / "x.csv"), "--format", "csv",
          "SELECT 1"], 2, f"folder {tmp_path / 'no'} does not exist; create it first"),
        (["check", "--store", str(demo_store), "--html", str(tmp_path / "no" / "r.html")], 2,
         f"folder {tmp_path / 'no'} does not exist; create it first"),
        (["index", str(src), "--store", "/proc/mapstore-store"], 1,
         "error: /proc/mapstore-store: cannot create the store here"),
        (["check", "--store", str(empty)], 1, "the store has no catalog yet; run 'mapstore index ROOT --store"),
        (["labels", "--store", str(empty), "--vocab", str(grid)], 1, "the store has no catalog yet"),
        (["features", "--store", str(empty)], 1, "the store has no catalog yet"),
        (["export", "--store", str(empty), "--out", str(tmp_path / "e")], 1, "the store has no catalog yet"),
        (["sql", "--store", str(tmp_path / "nowhere"), "SELECT 1"], 2, "no such store"),
        (["export", "--store", str(tmp_path / "nowhere"), "--out", str(tmp_path / "e")], 2, "no such store"),
        (["check", "--store", str(tmp_path / "nowhere")], 2, "no such store"),
        (["verify", str(tmp_path / "nothing")], 2, "does not exist"),
        (["index", str(tmp_path / "missing-root"), "--store", str(tmp_path / "s2")], 2, "does not exist"),
        (["sql", "--store", str(demo_store), "SELEC nonsense"], 1, "SQL does not parse"),
        (["labels", "--store", str(demo_store), "--vocab", str(tmp_path / "none.yaml")], 2, "does not exist"),
        (["index", str(src), "--store", str(tmp_path / "s3"), "--rules", str(grid)], 1,
         "expected an object with a 'rules' list"),
    ]
    for argv, code, text in cases:
        assert main(argv) == code, argv
        err = capsys.readouterr().err
        assert text in err and "Traceback" not in err, (argv, err)


def test_schema_command_prints_the_shipped_schemas(capsys):
    import json
    assert main(["schema"]) == 0
    names = capsys.readouterr().out.split()
    assert {"vocabulary", "name-rules", "origins", "maps"} <= set(names)
    assert main(["schema", "name-rules"]) == 0
    shipped = (Path(__file__).resolve().parents[2] / "schemas" / "name-rules.schema.json").read_text()
    assert json.loads(capsys.readouterr().out) == json.loads(shipped)
    assert main(["schema", "nope"]) == 2
    assert "no schema 'nope'" in capsys.readouterr().err


def test_help_loads_no_numeric_library():
    """`mapstore --help` imports the CLI and click only: numpy, pyarrow, DuckDB and scikit-learn load
    with the command that needs them (a fresh interpreter, its modules listed)."""
    import subprocess
    import sys

    code = ("import sys; from mapstore.cli import main\ntry:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
            "print(sorted(m for m in ('numpy', 'pyarrow', 'duckdb', 'sklearn', 'nibabel', 'scipy') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=Path(__file__).resolve().parents[2])
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip().splitlines()[-1] == "[]"


def test_the_store_comes_from_the_environment_and_the_set_option_has_one_name(demo_store, tmp_path, monkeypatch,
                                                                              capsys):
    monkeypatch.setenv("MAPSTORE_STORE", str(demo_store))
    assert main(["sql", "SELECT count(*) AS n FROM maps"]) == 0
    assert "(1 row)" in capsys.readouterr().out
    runner = CliRunner()
    for cmd in ("export", "check", "similar", "pool"):  # the set a command reads
        assert "--features" in runner.invoke(cli, [cmd, "--help"]).output, cmd
    for cmd in ("features", "parcels"):  # a command that makes a set names it --name (parcels reads --from)
        assert "--name" in runner.invoke(cli, [cmd, "--help"]).output, cmd
        assert "--features" not in runner.invoke(cli, [cmd, "--help"]).output, cmd
    assert "--from" in runner.invoke(cli, ["parcels", "--help"]).output
    assert "Exit 3 when a finding" in runner.invoke(cli, ["check", "--help"]).output
    assert "map_families" in runner.invoke(cli, ["sql", "--help"]).output


def test_a_sql_mistake_is_one_line_with_a_hint(demo_store, capsys):
    assert main(["sql", "--store", str(demo_store), "SELECT * FROM maps WHERE study = inkwell"]) == 1
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "needs quotes: 'inkwell'" in err and "SELECT" not in err
    assert main(["sql", "--store", str(demo_store), "SELEC 1"]) == 1
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


def test_an_unknown_grid_or_mask_is_a_usage_error(demo_store, tmp_path, capsys):
    import shutil

    store = tmp_path / "s"
    shutil.copytree(demo_store, store)
    assert main(["features", "--store", str(store), "--grid", "bogus"]) == 2
    assert main(["features", "--store", str(store), "--grid", "MNI152-3mm", "--mask", "bogus"]) == 2
    assert "unknown built-in grid" in capsys.readouterr().err


def test_every_option_has_help_and_commands_come_in_workflow_order():
    runner = CliRunner()
    text = runner.invoke(cli, ["--help"]).output
    listed = [line.split()[0] for line in text.split("Commands:")[1].strip().splitlines()]
    assert listed[:4] == ["index", "features", "labels", "export"]
    missing = [(name, p.opts) for name, cmd in cli.commands.items() for p in cmd.params
               if getattr(p, "help", "x") is None and not getattr(p, "hidden", False) and p.param_type_name == "option"]
    assert missing == []


def test_every_command_shows_an_example_of_itself():
    from mapstore.cli import cli

    for name, command in cli.commands.items():
        text = command.help or ""
        assert "Example:" in text and f"mapstore {name} " in text.split("Example:")[1], name
