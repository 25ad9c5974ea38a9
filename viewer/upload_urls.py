"""URLs of the upload page; included from viewer/urls.py."""

from __future__ import annotations

from django.urls import path

from . import upload_views

urlpatterns = [
    path("studies/<slug:slug>/upload/", upload_views.study_upload, name="viewer-study-upload"),
    path(
        "studies/<slug:slug>/upload/<str:job>/",
        upload_views.study_upload_status,
        name="viewer-study-upload-status",
    ),
    path(
        "studies/<slug:slug>/upload/<str:job>/progress/",
        upload_views.study_upload_progress,
        name="viewer-study-upload-progress",
    ),
]
