from __future__ import annotations

from django.urls import path

from . import views

urlpatterns = [
    path("studies/", views.StudyList.as_view(), name="studies-study-list"),
    path("worklist/", views.Worklist.as_view(), name="studies-worklist"),
    path("reads/<uuid:code>/", views.ReadDetail.as_view(), name="studies-read-detail"),
    path("reads/<uuid:code>/events/", views.ReadEvents.as_view(), name="studies-read-events"),
    path("reads/<uuid:code>/submit/", views.ReadSubmit.as_view(), name="studies-read-submit"),
    path("reads/<uuid:code>/activity/", views.ReadActivity.as_view(), name="studies-read-activity"),
    path(
        "reads/<uuid:code>/volume/<str:level>/",
        views.ReadVolume.as_view(),
        name="studies-read-volume",
    ),
]
