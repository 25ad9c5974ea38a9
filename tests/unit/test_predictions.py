"""Detector predictions: per-row validation, nothing stored on bad input, scores stored."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.test import Client

from studies.analysis.pipeline import run_analysis
from studies.models import DetectorRun
from studies.services import analysis_runs, predictions
from tests.unit.results_study import analysed


@pytest.fixture
def results(cast, django_user_model, settings, tmp_path):
    return analysed(cast, django_user_model, Path(settings.CAIRN_DATA_DIR), tmp_path)


#: Detector offsets from the consensus (mm): A is 1.5 mm off on every case; B 0, 2.4, 3.5 mm.
OFFSET_A = (1.5, 0.0, 0.0)
OFFSETS_B = ((0.0, 0.0, 0.0), (0.0, 2.4, 0.0), (0.0, 0.0, 3.5))


def consensus_points(results) -> pd.DataFrame:
    frame = analysis_runs.frame_of(results.run.tables["consensus"])
    return frame.sort_values(["case", "landmark"]).reset_index(drop=True)


def offset_csv(results) -> bytes:
    lines = ["case,landmark,x_mm,y_mm,z_mm,detector"]
    b = 0
    for row in consensus_points(results).itertuples(index=False):
        if row.landmark == "A":
            offset = OFFSET_A
        else:
            offset, b = OFFSETS_B[b], b + 1
        xyz = np.array([row.x_mm, row.y_mm, row.z_mm]) + offset
        x, y, z = (repr(float(v)) for v in xyz)
        lines.append(f"{row.case},{row.landmark},{x},{y},{z},net-7")
    return ("\n".join(lines) + "\n").encode()


def test_it_scores_known_offsets_as_their_radial_errors(results, cast) -> None:
    """Radial error is the Euclidean distance to the reference, MRE its mean, SDR_z the share
    below z mm (Wang et al. 2016; check-values section 7). A: 1.5 mm on every case gives MRE
    1.5, SD 0, SDR_2 = 1. B: 0, 2.4 and 3.5 mm give MRE 1.9667, SDR_2 = 1/3, SDR_2.5 = 2/3,
    SDR_3 = 2/3, SDR_4 = 1 (computed by hand, 1e-9)."""
    run = predictions.upload_predictions(results.study, cast["pi"], offset_csv(results))
    assert run.name == "net-7" and run.n_rows == 6
    tables = predictions.latest_detector_tables(results.study)
    det = tables["detector"].set_index(["landmark", "rater"])
    a, b = det.loc[("A", "net-7")], det.loc[("B", "net-7")]
    np.testing.assert_allclose([a["mre_mm"], a["sd_mm"], a["sdr_2mm"]], [1.5, 0.0, 1.0], atol=1e-9)
    np.testing.assert_allclose(
        [b["mre_mm"], b["sdr_2mm"], b["sdr_2_5mm"], b["sdr_3mm"], b["sdr_4mm"]],
        [(2.4 + 3.5) / 3, 1 / 3, 2 / 3, 2 / 3, 1.0],
        atol=1e-9,
    )
    assert set(tables["williams"]["landmark"]) == {"A", "B"}


def test_the_stored_scores_equal_the_analysis_core_on_the_same_input(results, cast) -> None:
    """The service adds nothing to the numbers: the core (run_analysis) is the reference."""
    predictions.upload_predictions(results.study, cast["pi"], offset_csv(results))
    clean, _ = predictions.validate_upload(
        results.study, predictions.parse_csv(offset_csv(results))
    )
    expected = run_analysis(
        analysis_runs.placements_table(results.study),
        clean,
        **analysis_runs.parameters_of(results.study),
    ).tables
    for name, frame in predictions.latest_detector_tables(results.study).items():
        numeric = expected[name].select_dtypes("number").columns
        np.testing.assert_allclose(
            frame[numeric].to_numpy(float),
            expected[name][numeric].to_numpy(float),
            rtol=1e-12,
            equal_nan=True,
        )


def test_it_reports_every_bad_row_and_stores_nothing(results, cast) -> None:
    p0, p1, p2 = sorted(results.files)
    text = (
        "\n".join(
            [
                "case,landmark,x_mm,y_mm,z_mm",
                f"{p0},A,1,2,3",
                "NOPE,A,1,2,3",
                f"{p0},Z,1,2,3",
                f"{p1},A,abc,2,3",
                f"{p1},B,1,,3",
                f"{p0},A,4,5,6",
                f"{p2},A,inf,0,0",
                f"{p2},B,,,",
            ]
        )
        + "\n"
    )
    with pytest.raises(predictions.PredictionsError) as caught:
        predictions.upload_predictions(results.study, cast["pi"], text.encode())
    found = [(e.row, e.column) for e in caught.value.row_errors]
    assert found == [
        (2, "case"),
        (3, "landmark"),
        (4, "x_mm"),
        (5, "x_mm"),
        (6, "landmark"),
        (7, "x_mm"),
    ]
    messages = [e.message for e in caught.value.row_errors]
    assert "'NOPE'" in messages[0] and "'abc'" in messages[2] and "row 1" in messages[4]
    assert "row 2" in str(caught.value) and "5 more" in str(caught.value)
    assert DetectorRun.objects.count() == 0


@pytest.mark.parametrize(
    ("payload", "words"),
    [
        (b"case,landmark,x_mm\n", "missing column 'y_mm'"),
        (b"case,landmark,x_mm,y_mm,z_mm\n", "no rows"),
        (b"\xff\xfe\x00bad", "not UTF-8"),
    ],
)
def test_it_refuses_unreadable_files(results, cast, payload, words) -> None:
    with pytest.raises(predictions.PredictionsError, match=words):
        predictions.upload_predictions(results.study, cast["pi"], payload)
    assert DetectorRun.objects.count() == 0


def test_it_refuses_two_detectors_in_one_file(results, cast) -> None:
    p0 = sorted(results.files)[0]
    text = f"case,landmark,x_mm,y_mm,z_mm,detector\n{p0},A,0,0,0,one\n{p0},B,0,0,0,two\n"
    with pytest.raises(predictions.PredictionsError) as caught:
        predictions.upload_predictions(results.study, cast["pi"], text.encode())
    assert [(e.row, e.column) for e in caught.value.row_errors] == [(2, "detector")]


def test_it_accepts_the_coordinator_side_case_label(results, cast) -> None:
    study = results.study
    lines = ["case,landmark,x_mm,y_mm,z_mm"]
    for row in consensus_points(results).itertuples(index=False):
        label = study.cases.get(pseudonym=row.case).label
        x, y, z = (repr(float(v)) for v in (row.x_mm, row.y_mm, row.z_mm))
        lines.append(f"{label},{row.landmark},{x},{y},{z}")
    predictions.upload_predictions(study, cast["pi"], ("\n".join(lines) + "\n").encode())
    det = predictions.latest_detector_tables(study)["detector"]
    np.testing.assert_allclose(det.loc[det["rater"] == "detector", "mre_mm"], 0.0, atol=1e-9)


def test_the_upload_api_returns_row_errors_and_the_page_lists_them(results, cast) -> None:
    url = f"/api/v1/studies/{results.study.slug}/predictions/"
    bad = b"case,landmark,x_mm,y_mm,z_mm\nNOPE,A,1,2,3\n"
    client = Client()
    client.force_login(cast["reader_a"])
    assert client.post(url, {"file": SimpleUploadedFile("p.csv", bad)}).status_code == 403
    client.force_login(cast["pi"])
    response = client.post(url, {"file": SimpleUploadedFile("p.csv", bad)})
    assert response.status_code == 400
    assert response.json()["row_errors"][0] == {
        "row": 1,
        "column": "case",
        "message": "case 'NOPE' is not a case of this study with submitted reads",
    }
    good = client.post(
        url, {"file": SimpleUploadedFile("p.csv", offset_csv(results)), "name": "net-7b"}
    )
    assert good.status_code == 201 and good.json()["name"] == "net-7b"
    page = client.post(
        f"/studies/{results.study.slug}/predictions/", {"file": SimpleUploadedFile("p.csv", bad)}
    )
    assert page.status_code == 400 and b'id="row-errors"' in page.content
    assert b"NOPE" in page.content and DetectorRun.objects.count() == 1


def test_the_success_figure_draws_the_uploaded_detector_beside_the_readers(
    results, cast, monkeypatch
) -> None:
    """The detector's radial errors drawn are its known offsets from the consensus (0, 1.5
    x 3, 2.4, 3.5 mm, computed by hand), under its upload name, next to the readers'."""
    from studies.reporting import figures, report

    drawn = {}
    draw = figures.success_svg
    monkeypatch.setattr(figures, "success_svg",
                        lambda errors, name: drawn.update(errors=errors, name=name) or
                        draw(errors, name))
    predictions.upload_predictions(results.study, cast["pi"], offset_csv(results))
    svg = report.figure_svg(results.study, "success")
    assert svg.lstrip().startswith("<?xml") and svg.rstrip().endswith("</svg>")
    assert drawn["name"] == "net-7"
    assert set(drawn["errors"]) == {"net-7", *analysis_runs.placements_table(results.study)
                                    ["reader"].astype(str)}
    np.testing.assert_allclose(np.sort(drawn["errors"]["net-7"]),
                               [0.0, 1.5, 1.5, 1.5, 2.4, 3.5], atol=1e-9)
