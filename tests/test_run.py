"""run_case: what the run adds to the budget beyond its parts (flags from the estimates)."""

from __future__ import annotations

from pathlib import Path

import errbudget

CASES = Path(__file__).resolve().parent.parent / "cases"


def test_unsettled_sobol_indices_raise_a_flag_with_advice(monkeypatch):
    # The convergence check of the indices (estimates at N/2 and N must agree within their
    # intervals) must reach the budget as a flag telling the user to raise the samples.
    from errbudget.budget import run

    real = run.sobol_indices

    def unsettled(design, y, **kwargs):
        result = real(design, y, **kwargs)
        result["_convergence"] = {
            "agree": False,
            "max_change": 0.3,
            "advice": "raise budget.samples to 32 or more",
        }
        return result

    monkeypatch.setattr(run, "sobol_indices", unsettled)
    case = errbudget.load_case(CASES / "mussel-bed.toml")
    flags = errbudget.run_case(case, samples=16).to_dict()["flags"]
    found = [f for f in flags if f["code"] == "indices-unsettled"]
    assert len(found) == 1
    assert "raise budget.samples to 32 or more" in found[0]["message"]
    assert '"density after three years"' in found[0]["message"]
