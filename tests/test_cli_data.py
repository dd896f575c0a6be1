"""The command line with a data table: `fisherwalk run model.py --data table.csv`, its
refusals (naming the column and the row, leaving only error.txt), --pointwise, --thin,
--restarts, --checkpoint and `fisherwalk resume`, and the compilation cache."""

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from fisherwalk import InputError
from fisherwalk.cli import command as cli
from fisherwalk.cli.datafile import read_table

MODELS = Path(__file__).parent / "models"
TABLE_MODEL = MODELS / "table_model.py"
# invented counts of seedlings against hours of shade (demo data for the command's tests)
GOOD = "plot,count,hours\nA,3,0.5\nB,1,2.0\nC,5,0.0\nD,2,1.5\nE,0,3.0\nF,4,1.0\n"
SMALL = ["--chains", "2", "--draws", "200", "--warmup", "100", "--seed", "4", "--quiet"]


def _csv(tmp_path, text, name="table.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def _refused(tmp_path, capsys, text):
    out = tmp_path / "out"
    out.mkdir()  # an existing folder gets the note; a missing one is never created
    code = cli.main(["run", str(TABLE_MODEL), "--data", str(_csv(tmp_path, text)),
                     "--out", str(out), "--no-compile-cache", *SMALL])
    err = capsys.readouterr().err
    assert code == 2
    assert sorted(p.name for p in out.iterdir()) == ["error.txt"]  # nothing else written
    assert (out / "error.txt").read_text().strip() == err.strip()
    assert "what to do:" in err and "Traceback" not in err
    return err


def test_missing_column_exits_2_naming_it(tmp_path, capsys):
    err = _refused(tmp_path, capsys, "plot,count\nA,3\nB,1\n")
    assert "column(s) 'hours'" in err and "the file has plot, count" in err


def test_text_cell_exits_2_naming_column_and_row(tmp_path, capsys):
    err = _refused(tmp_path, capsys, "plot,count,hours\nA,3,0.5\nB,many,2.0\n")
    assert "column 'count', row 2" in err and "'many'" in err and "(line 3)" in err


@pytest.mark.parametrize("text, message", [
    ("count,hours\n3,0.5\n,2.0\n", "column 'count', row 2 is empty"),
    ("count,hours\n3,0.5\n1,nan\n", "column 'hours', row 2 holds 'nan'"),
    ("count,hours\n3,0.5\n1,2.0,7\n", "Row 2 has 3 cell(s); the header has 2"),
    ("count,count\n3,0.5\n", "names column 'count' twice"),
    ("count,hours\n", "no data rows"),
])
def test_table_refusals_name_the_place(tmp_path, text, message):
    with pytest.raises(InputError, match=None) as caught:
        read_table(_csv(tmp_path, text), ("count", "hours"))
    assert message in str(caught.value)


@pytest.mark.parametrize("cell", ["1_000", "\u0663", "\uff13", "\u0661.5", "inf", "NaN",
                                  "0x10", "\u00b2"])
def test_csv_reader_refuses_numbers_that_are_not_plain_ascii_decimals(tmp_path, cell):
    # issue 21, item 12: Python's float() reads 1_000, Arabic-Indic and full-width digits
    with pytest.raises(InputError, match="column 'count', row 2") as caught:
        read_table(_csv(tmp_path, f"count,hours\n3,0.5\n{cell},2.0\n"), ("count", "hours"))
    assert "ASCII digits" in str(caught.value)


@pytest.mark.slow
def test_twenty_csv_columns_are_read_column_wise(tmp_path):
    # issue 21, item 12: 20 columns took about 17x the file's size in memory (a Python
    # string per cell); column-wise float arrays need the text and 8 bytes per number
    import tracemalloc

    rng = np.random.default_rng(0)
    names = [f"c{j}" for j in range(20)]
    table = rng.normal(size=(20_000, 20)).round(6)
    lines = [",".join(names)] + [",".join(f"{v:.6f}" for v in row) for row in table]
    path = _csv(tmp_path, "\n".join(lines) + "\n", "wide.csv")
    size = path.stat().st_size
    tracemalloc.start()
    got = read_table(path, names)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    np.testing.assert_array_equal(got.columns["c7"], table[:, 7])
    # raw bytes + decoded text (about 2x) + the float arrays (about 0.8x here) and the
    # growth copies: 5x leaves room, and is far below the 17x of a string per cell
    assert peak < 5 * size


def test_undeclared_columns_need_not_be_numeric(tmp_path):
    table = read_table(_csv(tmp_path, "\ufeffplot, count ,hours\nA,3,0.5\nB,1,2e0\n"),
                       ("count", "hours"))
    assert list(table.columns) == ["count", "hours"] and table.rows == 2
    np.testing.assert_array_equal(table.columns["hours"], [0.5, 2.0])
    with pytest.raises(InputError, match="column 'plot', row 1"):
        read_table(_csv(tmp_path, "plot,count\nA,3\n", "b.csv"))  # no declaration: all


def test_make_and_data_must_come_together(tmp_path, capsys):
    assert cli.main(["run", str(TABLE_MODEL), "--out", str(tmp_path / "a"),
                     "--no-compile-cache"]) == 2
    assert "needs a data file" in capsys.readouterr().err
    assert cli.main(["run", str(MODELS / "good_model.py"), "--data",
                     str(_csv(tmp_path, GOOD)), "--out", str(tmp_path / "b"),
                     "--no-compile-cache"]) == 2
    assert "defines no make(data)" in capsys.readouterr().err
    assert cli.main(["run", str(MODELS / "good_model.py"), "--pointwise", "--out",
                     str(tmp_path / "c"), "--no-compile-cache"]) == 2
    assert "defines no pointwise(position)" in capsys.readouterr().err


# ------------------------------------------------------------------ a run, and its resumption

RUN = ["--pointwise", "--thin", "2", "--restarts", "1", "--checkpoint", "--no-compile-cache",
       *SMALL]


@pytest.fixture(scope="module")
def table_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("table")
    data = _csv(folder, GOOD)
    out = folder / "out"
    code = cli.main(["run", str(TABLE_MODEL), "--data", str(data), "--out", str(out), *RUN])
    return code, data, out


@pytest.mark.slow
def test_table_run_stores_pointwise_and_derived(table_run):
    code, data, out = table_run
    assert code == 0
    record = json.loads((out / "record.json").read_text())
    assert record["options"]["thin"] == 2 and record["sampling"]["thin"] == 2
    assert record["options"]["laplace"]["restarts"] == 1
    assert record["data_file"]["rows"] == 6 and record["data_file"]["columns"] == ["count",
                                                                                  "hours"]
    assert record["compile_cache"] == {"used": False, "reason": "--no-compile-cache"}
    assert record["sampling"]["derived"] == ["rate_at_zero"]
    rows = {row["name"]: row for row in record["summary"]["parameters"]}
    assert set(rows) == {"a", "b", "rate_at_zero"}
    with np.load(out / "draws.npz", allow_pickle=False) as saved:
        draws, names = saved["draws"], list(saved["names"])
        derived = saved["derived"]
        assert list(saved["derived_names"]) == ["rate_at_zero"]
        assert "pointwise" not in saved.files  # kept in its own compressed file
    with np.load(out / "pointwise.npz", allow_pickle=False) as saved:
        pointwise = saved["pointwise"]
    stored = record["sampling"]["pointwise"]
    assert stored["file"] == "pointwise.npz" and stored["shape"] == [2, 200, 6]
    assert stored["bytes"] == (out / "pointwise.npz").stat().st_size
    assert draws.shape == (2, 200, 2) and pointwise.shape == (2, 200, 6)
    a, b = draws[..., names.index("a")], draws[..., names.index("b")]
    count = np.array([3, 1, 5, 2, 0, 4.0])
    hours = np.array([0.5, 2.0, 0.0, 1.5, 3.0, 1.0])
    rate = np.exp(a[..., None] + b[..., None] * hours)
    np.testing.assert_allclose(pointwise, stats.poisson.logpmf(count, rate), rtol=1e-10)
    np.testing.assert_allclose(derived[..., 0], np.exp(a), rtol=1e-14)
    assert rows["rate_at_zero"]["mean"] == pytest.approx(np.exp(a).mean(), rel=1e-12)


@pytest.mark.slow
def test_interrupted_run_resumes_to_the_same_draws(table_run, tmp_path, interrupt_sampling,
                                                  capsys):
    _, data, reference = table_run
    out = tmp_path / "out"
    interrupt_sampling(1)  # Ctrl-C after the first chunk of kept draws
    code = cli.main(["run", str(TABLE_MODEL), "--data", str(data), "--out", str(out), *RUN])
    assert code == 130
    assert f"fisherwalk resume {out} --model" in capsys.readouterr().err
    assert sorted(p.name for p in out.iterdir()) == ["checkpoint", "command.json"]
    interrupt_sampling(None)
    code = cli.main(["resume", str(out), "--model", str(TABLE_MODEL), "--quiet",
                     "--no-compile-cache"])
    assert code == 0
    with np.load(out / "draws.npz") as got, np.load(reference / "draws.npz") as want:
        for name in ("draws", "logdensity", "derived"):
            np.testing.assert_array_equal(got[name], want[name])
    with np.load(out / "pointwise.npz") as got, np.load(reference / "pointwise.npz") as want:
        np.testing.assert_array_equal(got["pointwise"], want["pointwise"])
    record = json.loads((out / "record.json").read_text())
    assert record["command"] == "resume" and record["sampling"]["complete"] is True
    assert record["options"]["thin"] == 2


def test_resume_without_a_checkpoint_is_refused(tmp_path, capsys):
    code = cli.main(["resume", str(tmp_path), "--model", str(TABLE_MODEL),
                     "--no-compile-cache"])
    assert code == 2 and "holds no resumable run" in capsys.readouterr().err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["error.txt"]


@pytest.mark.slow
def test_compile_cache_is_on_by_default_and_recorded(tmp_path):
    # A fresh process, as a user runs the command: JAX sets its cache up once per process.
    env = {**os.environ, "XDG_CACHE_HOME": str(tmp_path / "cache")}
    out = tmp_path / "out"
    subprocess.run([sys.executable, "-c", "import sys; from fisherwalk.cli import main; "
                    "sys.exit(main(sys.argv[1:]))", "run", str(MODELS / "good_model.py"),
                    "--out", str(out), *SMALL], env=env, check=True, capture_output=True)
    cache = json.loads((out / "record.json").read_text())["compile_cache"]
    folder = tmp_path / "cache" / "fisherwalk" / "jax"
    assert cache["used"] is True and cache["folder"] == str(folder)
    assert cache["entries_before"] == 0 and cache["entries_after"] == len(os.listdir(folder)) > 0


@pytest.mark.parametrize("command", ["run", "resume"])
def test_help_describes_data_and_resume(command, capsys):
    with pytest.raises(SystemExit) as stop:
        cli.main([command, "--help"])
    assert stop.value.code == 0
    out = capsys.readouterr().out
    assert "--no-compile-cache" in out and "run only model files you trust" in out
    if command == "run":
        assert "make(data)" in out and "--pointwise" in out and "--checkpoint" in out
    else:
        assert "fisherwalk resume results --model model.py" in out
