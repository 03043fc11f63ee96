"""Recipe 6 — the whole battery in the test suite, spread over all cores.

Each ``battery(...)`` line becomes one pytest test per check (``test_grade[gradient]``,
``test_gaps[reference]`` …); the fixture ``run_battery`` runs a battery inside an ordinary test.

    pytest recipes/orchard/test_sorting_line.py -n auto
    pytest recipes/orchard/test_sorting_line.py -k reference --lossguard-effort quick
"""

from __future__ import annotations

from bruise_focal import focal_v2
from conveyor_gaps import gap_ce
from poly_grade import poly1_grade
from smoothed_bruise import smoothed_bruise
from stem_numpy import stem_loss, stem_loss_grad

from lossguard.pytest_plugin import battery

test_grade = battery(poly1_grade, kind="categorical", params={"epsilon": 1.0})
test_bruise = battery(smoothed_bruise, kind="categorical", reference="smoothed_ce", params={"epsilon": 0.1})
test_stems = battery(stem_loss, kind="binary", reference="bce", grad=stem_loss_grad)
test_gaps = battery(gap_ce, kind="categorical", reference="categorical_ce", ignore_label=-1)
test_focal = battery(focal_v2, kind="categorical", reference="focal_multiclass", params={"gamma": 0.5})


def test_focal_matches_its_reference(run_battery):
    result = run_battery(focal_v2, kind="categorical", reference="focal_multiclass",
                         params={"gamma": 0.5}, only=["reference"])
    assert result.check("reference").failed == 0
