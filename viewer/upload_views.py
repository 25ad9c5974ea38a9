"""The coordinator's upload page: send scans, follow the import's progress.

The page saves the files through `studies.services.uploads.start_upload` and queues the
import as a Celery task; the status page polls a small JSON view. Access goes through
`studies.access.get_study` with the coordinator role, as on the other set-up pages.
"""

from __future__ import annotations

from django import forms
from django.contrib.auth.decorators import login_required
from django.http import Http404, HttpRequest, HttpResponse, JsonResponse
from django.shortcuts import redirect, render

from studies.access import get_study
from studies.constants import Role
from studies.services.errors import ServiceError
from studies.services.uploads import UploadChoices, load_status, start_upload
from studies.tasks import import_upload_task

COORDINATOR = [Role.COORDINATOR]


class MultipleFileInput(forms.ClearableFileInput):
    allow_multiple_selected = True


class MultipleFileField(forms.FileField):
    """A file field that accepts several files (the pattern in Django's file-upload docs)."""

    def __init__(self, *args, **kwargs) -> None:
        kwargs.setdefault("widget", MultipleFileInput(attrs={"accept": ".nii,.gz,.zip"}))
        super().__init__(*args, **kwargs)

    def clean(self, data, initial=None):
        single = super().clean
        if isinstance(data, (list, tuple)):
            return [single(item, initial) for item in data]
        return [single(data, initial)]


class UploadForm(forms.Form):
    """Files plus the choices the command line also offers."""

    files = MultipleFileField(
        label="Scans", help_text="One or more .nii or .nii.gz files, or a zip of DICOM files."
    )
    series = forms.CharField(
        required=False,
        max_length=100,
        label="DICOM series",
        help_text="Only when the zip holds several series: the number or UID from the list.",
    )
    volume = forms.IntegerField(
        required=False,
        min_value=0,
        label="4D volume",
        help_text="Only for 4D NIfTI files: which volume to import (0 is the first).",
    )
    allow_burned_in = forms.BooleanField(
        required=False,
        label="Allow images marked as having burned-in annotation",
        help_text="Only after checking that the pixels show no identifying text.",
    )


@login_required
def study_upload(request: HttpRequest, slug: str) -> HttpResponse:
    """Upload scans to a study; the import runs in the background."""
    study = get_study(request.user, slug, COORDINATOR)
    form = UploadForm(request.POST or None, request.FILES or None)
    if request.method == "POST" and form.is_valid():
        data = form.cleaned_data
        choices = UploadChoices(
            series=data["series"] or None,
            volume_index=data["volume"],
            allow_burned_in=bool(data["allow_burned_in"]),
        )
        try:
            job_id = start_upload(study, data["files"], choices)
        except ServiceError as exc:
            form.add_error(None, f"{exc}. Nothing was stored.")
        else:
            import_upload_task.delay(job_id=job_id)
            return redirect("viewer-study-upload-status", slug=study.slug, job=job_id)
    return render(request, "viewer/study_upload.html", {"study": study, "form": form})


def _status(request: HttpRequest, slug: str, job: str) -> tuple:
    study = get_study(request.user, slug, COORDINATOR)
    try:
        return study, load_status(study, job)
    except ServiceError:
        raise Http404("no such upload") from None


@login_required
def study_upload_status(request: HttpRequest, slug: str, job: str) -> HttpResponse:
    """The progress of one upload; the page script polls `study_upload_progress`."""
    study, status = _status(request, slug, job)
    return render(
        request, "viewer/study_upload_status.html", {"study": study, "job": job, "status": status}
    )


@login_required
def study_upload_progress(request: HttpRequest, slug: str, job: str) -> JsonResponse:
    """JSON: state, done, total, outcomes (source, status, detail) and any error."""
    _, status = _status(request, slug, job)
    keys = ("state", "done", "total", "outcomes", "error")
    return JsonResponse({key: status.get(key) for key in keys})
