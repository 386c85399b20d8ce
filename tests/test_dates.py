"""Calendar dates: ``[simulation] start``, dates for the horizon, ``at`` and the counts, and
``[simulation] time_unit``. A case with dates gives the numbers of the same case in elapsed
days; budget.json shows both."""

from __future__ import annotations

import datetime as dt

import pytest
from conftest import CRAYFISH_COUNTS, MARSH_COUNTS, without_clock

from errbudget import load_case, run_case
from errbudget.case.counts import read_case_counts
from errbudget.case.dates import date_text
from errbudget.errors import InputError

START = dt.date(2025, 3, 1)


def _dated(days: float) -> str:
    return (START + dt.timedelta(days=days)).isoformat()


def _write(folder, text: str, counts: str):
    (folder / "marsh-counts.csv").write_text(counts, encoding="utf-8")
    path = folder / "case.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _dated_case_text() -> str:
    return (
        CRAYFISH_COUNTS.replace('horizon = "200 day"', f"horizon = {_dated(200)}\nstart = {START}")
        .replace('at = "200 day"', f'at = "{_dated(200)}"')
        .replace('time_unit = "day"\n', "")
    )


def _dated_counts() -> str:
    lines = MARSH_COUNTS.strip().splitlines()
    rows = [f"{_dated(float(t))},{c}" for t, c in (line.split(",") for line in lines[1:])]
    return "day,count\n" + "\n".join(rows) + "\n"


def _numbers(budget: dict) -> dict:
    data = without_clock(budget)
    data.pop("case")
    for item in (data["simulation"], data["simulation"]["horizon"]):
        for key in ("start", "date"):
            item.pop(key, None)
    for q in data["quantities"]:
        q.pop("dates")
        if q["at"]:
            q["at"].pop("date")
    data["fit"].pop("counts_sha256", None)
    data["fit"].pop("counts_file", None)
    if data.get("validation"):
        data["validation"].pop("dates", None)
    return data


def test_a_case_with_dates_gives_the_numbers_of_the_case_in_elapsed_days(tmp_path):
    (tmp_path / "days").mkdir()
    (tmp_path / "dates").mkdir()
    plain = load_case(_write(tmp_path / "days", CRAYFISH_COUNTS, MARSH_COUNTS))
    dated = load_case(_write(tmp_path / "dates", _dated_case_text(), _dated_counts()))
    assert dated.horizon == plain.horizon == 200.0
    assert dated.quantities[0].at == 200.0
    assert list(read_case_counts(dated).times) == list(read_case_counts(plain).times)

    first = run_case(plain, samples=64).to_dict()
    second = run_case(dated, samples=64).to_dict()
    assert _numbers(second) == _numbers(first)

    # budget.json shows the date beside the elapsed time.
    assert second["simulation"]["start"] == "2025-03-01"
    assert second["simulation"]["horizon"] == {
        "value": 200.0,
        "unit": "day",
        "date": "2025-09-17",
    }
    assert second["quantities"][0]["at"]["date"] == "2025-09-17"
    days_to = second["quantities"][1]
    expected = START + dt.timedelta(days=days_to["reference"])
    assert days_to["dates"]["reference"] == expected.isoformat()
    assert second["validation"]["dates"][:2] == ["2025-03-01", "2025-03-29"]  # day 0 and 28
    assert first["simulation"]["start"] is None and first["quantities"][1]["dates"] is None


def test_time_unit_sets_the_unit_of_results(tmp_path):
    weeks = CRAYFISH_COUNTS.replace('step = "7 day"', 'step = "1 week"\ntime_unit = "day"')
    case = load_case(_write(tmp_path, weeks, MARSH_COUNTS))
    assert case.time_unit == "day" and case.step == 7.0 and case.horizon == 200.0


def test_time_unit_keeps_the_users_spelling_of_the_population_unit(tmp_path):
    """The time unit's text must not stand in for the population unit's spelling."""
    text = CRAYFISH_COUNTS.replace("crayfish", "kg").replace(
        'step = "7 day"', 'step = "1 week"\ntime_unit = "day"'
    )
    case = load_case(_write(tmp_path, text, MARSH_COUNTS))
    assert case.population_unit == "kg" and case.time_unit == "day"


def test_date_text_of_a_start_with_a_time_of_day():
    assert date_text("2025-03-01T06:00:00", 1.25, 1.0) == "2025-03-02T12:00"
    assert date_text("2025-03-01", 140.3, 1.0) == "2025-07-19"
    assert date_text("2025-03-01", 2.0, 7.0) == "2025-03-15"  # two weeks
    assert date_text(None, 2.0, 1.0) is None


@pytest.mark.parametrize(
    ("edit", "where", "says"),
    [
        (('at = "200 day"', 'at = "2025-09-17"'), "quantity[1].at", "no start date"),
        (('horizon = "200 day"', "horizon = 2025-09-17"), "simulation.horizon", "no start date"),
        (
            ('horizon = "200 day"', 'horizon = "200 day"\nstart = "2025-02-30"'),
            "simulation.start",
            "not a valid calendar date",
        ),
        (
            ('horizon = "200 day"', 'horizon = "200 day"\nstart = 2025-03-01'),
            "counts.start",
            "remove [counts] start",
        ),
    ],
    ids=["at-without-start", "horizon-without-start", "bad-start", "two-starts"],
)
def test_dates_refused_with_the_key(tmp_path, edit, where, says):
    text = CRAYFISH_COUNTS.replace(*edit)
    if where == "counts.start":
        text = text.replace(
            'fit = ["r", "K", "N0"]', 'fit = ["r", "K", "N0"]\nstart = "2025-03-01"'
        )
    with pytest.raises(InputError) as caught:
        load_case(_write(tmp_path, text, MARSH_COUNTS))
    message = caught.value.format()
    assert where in message and says in message, message
