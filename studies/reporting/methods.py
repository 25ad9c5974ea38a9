"""The methods paragraph of the report, generated from a study's parameters.

:func:`methods` takes a plain dict (see :data:`REQUIRED`) and returns the paragraph
with numbered citations, in the order they are first cited, and the reference list.
Every number in the paragraph comes from that dict, so a test can check them all.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

__all__ = ["CONSENSUS_WORDS", "REFERENCES", "REQUIRED", "Methods", "MethodsInputError",
           "methods", "number"]

#: Keys the parameters dict must have (numbers unless said otherwise).
REQUIRED = (
    "n_cases", "n_readers", "n_landmarks", "readers_per_case", "repeat_percent",
    "washout_days", "n_reads", "tolerance_mm", "consensus", "outlier_multiple",
    "loa_z", "rc_factor", "cusum_k", "cusum_h",
)

#: Full citations by key; "(from memory)" where the details were not checked in a copy.
REFERENCES: dict[str, str] = {
    "shrout": "Shrout PE, Fleiss JL. Intraclass correlations: uses in assessing rater "
              "reliability. Psychol Bull 1979;86(2):420-428. doi:10.1037/0033-2909.86.2.420",
    "mcgraw": "McGraw KO, Wong SP. Forming inferences about some intraclass correlation "
              "coefficients. Psychol Methods 1996;1(1):30-46 (issue from memory).",
    "fleiss": "Fleiss JL. Measuring nominal scale agreement among many raters. Psychol Bull "
              "1971;76(5):378-382. doi:10.1037/h0031619",
    "weiszfeld": "Weiszfeld E. Sur le point pour lequel la somme des distances de n points "
                 "donnes est minimum. Tohoku Math J 1937;43:355-386 (from memory).",
    "bland1986": "Bland JM, Altman DG. Statistical methods for assessing agreement between "
                 "two methods of clinical measurement. Lancet 1986;1(8476):307-310.",
    "bland1996": "Bland JM, Altman DG. Statistics notes: measurement error. BMJ 1996;313:744. "
                 "doi:10.1136/bmj.313.7059.744",
    "hotelling": "Hotelling H. The generalization of Student's ratio. Ann Math Stat "
                 "1931;2(3):360-378 (from memory).",
    "mann": "Mann HB. Nonparametric tests against trend. Econometrica 1945;13(3):245-259 "
            "(issue from memory).",
    "page": "Page ES. Continuous inspection schemes. Biometrika 1954;41(1-2):100-115. "
            "doi:10.1093/biomet/41.1-2.100",
    "williams": "Williams GW. Comparing the joint agreement of several raters with another "
                "rater. Biometrics 1976;32:619-627.",
    "chalana": "Chalana V, Kim Y. A methodology for evaluation of boundary detection "
               "algorithms on medical images. IEEE Trans Med Imaging 1997;16(5):642-652. "
               "doi:10.1109/42.640755",
}

CONSENSUS_WORDS = {
    "geomedian": "the geometric median of the readers' first-read points, computed with "
                 "Weiszfeld's algorithm {weiszfeld}",
    "mean": "the mean of the readers' first-read points",
    "median": "the coordinate-wise median of the readers' first-read points",
    "weighted": "a precision-weighted mean of the readers' first-read points, each reader "
                "weighted by the inverse of their error variance estimated from the data",
}


class MethodsInputError(ValueError):
    """A parameter the paragraph needs is missing or not usable; the message quotes it."""


@dataclass(frozen=True)
class Methods:
    """The methods paragraph and its numbered references.

    Attributes
    ----------
    text : str
        The paragraph; citations are written [n].
    references : list of str
        Full citations; reference n is ``references[n - 1]``.
    """

    text: str
    references: list[str]


def number(value: float) -> str:
    """A parameter as written in the paragraph: integers without a decimal point,
    others with up to 2 decimals (trailing zeros dropped)."""
    if float(value).is_integer():
        return str(int(value))
    return f"{value:.2f}".rstrip("0").rstrip(".")


def _check(params: Mapping) -> None:
    missing = [k for k in REQUIRED if k not in params]
    if missing:
        raise MethodsInputError(f"the methods paragraph needs {missing}; got {sorted(params)}")
    for key in REQUIRED:
        if key == "consensus":
            continue
        value = params[key]
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(
                value) or value < 0:
            raise MethodsInputError(f"{key} must be a finite number >= 0, got {value!r}")
    if params["consensus"] not in CONSENSUS_WORDS:
        raise MethodsInputError(
            f"consensus must be one of {sorted(CONSENSUS_WORDS)}, got {params['consensus']!r}")


def _plural(n: float, word: str) -> str:
    return f"{number(n)} {word}" + ("" if n == 1 else "s")


def _sentences(p: Mapping) -> list[str]:
    n = {k: number(p[k]) for k in REQUIRED if k != "consensus"}
    design = (
        f"{_plural(p['n_readers'], 'reader')} placed {_plural(p['n_landmarks'], 'landmark')} on "
        f"{_plural(p['n_cases'], 'case')} in a randomised, balanced design: each case was "
        f"assigned to {n['readers_per_case']} readers, blinded to each other, and "
        f"{n['repeat_percent']}% of each reader's cases were read again after a washout of at "
        f"least {_plural(p['washout_days'], 'day')}. The analysis used "
        f"{_plural(p['n_reads'], 'submitted read')}; coordinates are world millimetres (RAS+)."
    )
    consensus = CONSENSUS_WORDS[p["consensus"]]
    return [
        design,
        "Inter-reader agreement per landmark is the distance between every two readers' "
        "points and, per axis, the intraclass correlation ICC(2,1) (two-way random effects, "
        "absolute agreement, single reader) {shrout} {mcgraw}; agreement on whether a "
        "landmark is visible is Fleiss' kappa {fleiss}.",
        f"The consensus point of each case and landmark is {consensus}. A consensus point "
        f"is flagged for adjudication when the readers' mean pairwise distance exceeds the "
        f"tolerance of {n['tolerance_mm']} mm, when a reader lies farther from the other "
        f"readers' median than {n['tolerance_mm']} mm or {n['outlier_multiple']} times the "
        "group's robust spread, whichever is larger, or when readers disagree on visibility.",
        f"Readers are compared with Bland-Altman plots per axis, with limits of agreement at "
        f"the mean difference plus or minus {n['loa_z']} SD {{bland1986}}; repeatability is "
        f"the within-reader SD s_w of first and repeat reads and the repeatability "
        f"coefficient {n['rc_factor']} s_w {{bland1996}}. Each reader's bias is the mean "
        "vector from the consensus of the other readers to their point, tested against zero "
        "with Hotelling's T\u00b2 {hotelling}.",
        f"Drift over time is the least-squares slope and the Mann-Kendall trend test "
        f"{{mann}} of each reader's distance to the consensus of the others, and a two-sided "
        f"tabular CUSUM {{page}} of that distance standardised per landmark, with reference "
        f"value k = {n['cusum_k']} and decision interval h = {n['cusum_h']} (in SD units).",
    ]


def _detector_sentence(p: Mapping) -> str:
    radii = ", ".join(number(r) for r in p["sdr_radii_mm"])
    return (f"The automatic detector {p['detector']} is scored by its radial error against "
            f"the consensus (mean radial error and the share of points within {radii} mm) "
            "and by the Williams index against the readers, with a jackknife confidence "
            "interval over cases {williams} {chalana}.")


def methods(params: Mapping) -> Methods:
    """Write the methods paragraph for a study.

    Parameters
    ----------
    params : mapping
        The keys of :data:`REQUIRED`: n_cases, n_readers, n_landmarks, readers_per_case,
        repeat_percent (0-100), washout_days, n_reads (submitted reads analysed),
        tolerance_mm, consensus (one of :data:`CONSENSUS_WORDS`), outlier_multiple,
        loa_z (SD multiple of the limits of agreement), rc_factor (repeatability
        coefficient factor), cusum_k, cusum_h. Optional: detector (its name) with
        sdr_radii_mm (sequence of radii).

    Returns
    -------
    Methods
        text and references (numbered in the order of first citation).

    Raises
    ------
    MethodsInputError
        A required key is missing or a number is not finite and >= 0.
    """
    _check(params)
    sentences = _sentences(params)
    if params.get("detector"):
        sentences.append(_detector_sentence(params))
    order: list[str] = []
    text = " ".join(sentences)
    for key in REFERENCES:
        marker = "{" + key + "}"
        if marker in text:
            order.append(key)
    order.sort(key=lambda k: text.index("{" + k + "}"))
    for i, key in enumerate(order, start=1):
        text = text.replace("{" + key + "}", f"[{i}]")
    return Methods(text=text, references=[REFERENCES[k] for k in order])
