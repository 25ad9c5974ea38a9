"""The methods paragraph: every number in it is one of the study's parameters."""

from __future__ import annotations

import re

import pytest

from studies.reporting.methods import REFERENCES, MethodsInputError, methods, number

DEMO_LIKE = {
    "n_cases": 12, "n_readers": 3, "n_landmarks": 6, "readers_per_case": 3,
    "repeat_percent": 25, "washout_days": 14, "n_reads": 33, "tolerance_mm": 3.0,
    "consensus": "geomedian", "outlier_multiple": 3.0, "loa_z": 1.96, "rc_factor": 2.77,
    "cusum_k": 0.5, "cusum_h": 5.0,
}
#: Named statistics whose digits are part of the name, not parameters (common practice).
NAMES = ("ICC(2,1)",)


def numbers_in(text: str) -> list[float]:
    """Every number in the text, leaving out citation markers [n] and statistic names."""
    for name in NAMES:
        text = text.replace(name, "")
    text = re.sub(r"\[\d+\]", "", text)
    return [float(t) for t in re.findall(r"(?<![\w.])\d+(?:\.\d+)?", text)]


def numeric_parameters(params: dict) -> list[float]:
    values = []
    for value in params.values():
        if isinstance(value, (list, tuple)):
            values += [float(v) for v in value]
        elif isinstance(value, (int, float)) and not isinstance(value, bool):
            values.append(float(value))
    return values


@pytest.mark.parametrize("params", [
    DEMO_LIKE,
    {**DEMO_LIKE, "n_cases": 40, "n_readers": 7, "n_landmarks": 19, "readers_per_case": 4,
     "repeat_percent": 12.5, "washout_days": 21, "n_reads": 171, "tolerance_mm": 2.5,
     "consensus": "mean", "outlier_multiple": 4.0},
    {**DEMO_LIKE, "detector": "auto", "sdr_radii_mm": [2.0, 2.5, 3.0, 4.0]},
])
def test_every_number_in_the_paragraph_is_a_study_parameter(params):
    """Each number in the text equals a parameter (as written by `number`), and each
    parameter's value appears in the text."""
    text = methods(params).text
    found = numbers_in(text)
    allowed = numeric_parameters(params)
    assert found, text
    for value in found:
        assert any(value == pytest.approx(a) for a in allowed), f"{value} is not a parameter"
    for value in allowed:
        assert any(value == pytest.approx(f) for f in found), f"{value} missing from: {text}"


def test_it_states_the_design_numbers_in_their_places():
    text = methods(DEMO_LIKE).text
    assert "3 readers placed 6 landmarks on 12 cases" in text
    assert "25% of each reader's cases were read again after a washout of at least 14 days" in text
    assert "tolerance of 3 mm" in text
    assert "k = 0.5 and decision interval h = 5" in text


def test_it_numbers_the_references_in_the_order_they_are_cited():
    """Shrout & Fleiss 1979 (doi:10.1037/0033-2909.86.2.420), Fleiss 1971
    (doi:10.1037/h0031619), Bland & Altman 1986 and 1996 (doi:10.1136/bmj.313.7059.744),
    Weiszfeld 1937, Page 1954 (check-values sections 1, 2, 4, 6, 8b)."""
    result = methods(DEMO_LIKE)
    cited = [int(n) for n in re.findall(r"\[(\d+)\]", result.text)]
    assert cited == sorted(cited) and cited == list(range(1, len(result.references) + 1))
    joined = " ".join(result.references)
    for doi in ("10.1037/0033-2909.86.2.420", "10.1037/h0031619", "10.1136/bmj.313.7059.744"):
        assert doi in joined
    assert result.references[0].startswith("Shrout PE, Fleiss JL")
    assert "Lancet 1986;1(8476):307-310" in joined
    assert "Weiszfeld" in joined and "Page ES" in joined
    assert not any("Chalana" in r for r in result.references)  # no detector, no Williams


def test_a_detector_brings_the_williams_index_and_its_references():
    """Chalana & Kim 1997, doi:10.1109/42.640755 (check-values section 5)."""
    result = methods({**DEMO_LIKE, "detector": "auto", "sdr_radii_mm": [2.0, 2.5, 3.0, 4.0]})
    assert "within 2, 2.5, 3, 4 mm" in result.text
    assert any("10.1109/42.640755" in r for r in result.references)


def test_it_cites_weiszfeld_only_for_the_geometric_median():
    result = methods({**DEMO_LIKE, "consensus": "median"})
    assert "coordinate-wise median" in result.text
    assert REFERENCES["weiszfeld"] not in result.references


def test_it_writes_integers_without_a_decimal_point():
    assert [number(v) for v in (3.0, 2.5, 1.96, 12.5, 0.25)] == ["3", "2.5", "1.96", "12.5",
                                                                  "0.25"]


def test_it_refuses_missing_or_unusable_parameters():
    with pytest.raises(MethodsInputError, match="n_cases"):
        methods({k: v for k, v in DEMO_LIKE.items() if k != "n_cases"})
    with pytest.raises(MethodsInputError, match="nan"):
        methods({**DEMO_LIKE, "tolerance_mm": float("nan")})
    with pytest.raises(MethodsInputError, match="'centroid'"):
        methods({**DEMO_LIKE, "consensus": "centroid"})
