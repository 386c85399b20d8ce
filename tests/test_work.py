"""The work of a run is predicted before the heavy passes and bounded by [budget] time_limit."""

from __future__ import annotations

from pathlib import Path

import pytest

import errbudget
from errbudget.cli import main
from errbudget.errors import InputError

CRAYFISH = Path(__file__).resolve().parents[1] / "cases" / "crayfish-pond.toml"


def _with_budget(tmp_path, line: str) -> Path:
    path = tmp_path / "pond.toml"
    path.write_text(CRAYFISH.read_text().replace("seed = 1", f"seed = 1\n{line}"))
    return path


def test_prediction_is_close_to_the_work_done():
    data = errbudget.run_case(errbudget.load_case(CRAYFISH), samples=64).to_dict()
    work = data["run"]["work"]
    done = work["member_steps"]
    predicted = work["predicted_member_steps"]
    # The passes after the case's step: everything but the case's step itself.
    case_step = data["run"]["parameter_sets"] * 30  # ceil(210 / 7) steps per member
    assert 0.5 * (done - case_step) <= predicted <= 3 * (done - case_step)
    assert set(work["parts"]) >= {"reference levels", "candidate search"}
    assert data["run"]["prediction"]["predicted_seconds"] > 0


@pytest.mark.parametrize(
    ("line", "seconds"),
    [('time_limit = "90 s"', 90.0), ('time_limit = "2 min"', 120.0), ("time_limit = 45", 45.0)],
)
def test_time_limit_is_a_time_or_seconds(tmp_path, line, seconds):
    case = errbudget.load_case(_with_budget(tmp_path, line))
    assert case.budget.time_limit_s == pytest.approx(seconds)


@pytest.mark.parametrize(
    "line", ['time_limit = "7 crayfish"', "time_limit = 0", 'time_limit = "-1 s"']
)
def test_a_bad_time_limit_names_the_key(tmp_path, line):
    with pytest.raises(InputError) as caught:
        errbudget.load_case(_with_budget(tmp_path, line))
    assert caught.value.where == "budget.time_limit"


def test_a_run_past_the_limit_is_refused_with_what_to_lower(tmp_path, capsys):
    path = _with_budget(tmp_path, 'time_limit = "1 ms"')
    code = main(["run", str(path), "--out", str(tmp_path / "out"), "--samples", "16"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "budget.time_limit" in err
    assert "lower [budget] samples" in err and "--patient" in err
    assert not (tmp_path / "out").exists()


def test_patient_runs_past_the_limit(tmp_path, capsys):
    path = _with_budget(tmp_path, 'time_limit = "1 ms"')
    code = main(["run", str(path), "--out", str(tmp_path / "out"), "--samples", "16", "--patient"])
    assert code == 0
    assert (tmp_path / "out" / "pond" / "budget.json").exists()
