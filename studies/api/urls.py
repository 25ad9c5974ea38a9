from __future__ import annotations

from django.urls import path

from . import adjudication, exports, views

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
    # Adjudication and review (studies/api/adjudication.py).
    path("studies/<slug:slug>/adjudication/", adjudication.AdjudicationQueue.as_view(),
         name="studies-adjudication-queue"),
    path("studies/<slug:slug>/review/<uuid:case>/landmarks/<str:landmark>/",
         adjudication.ReviewDetail.as_view(), name="studies-review-detail"),
    path("studies/<slug:slug>/review/<uuid:case>/landmarks/<str:landmark>/decisions/",
         adjudication.ReviewDecisions.as_view(), name="studies-review-decisions"),
    path("studies/<slug:slug>/review/<uuid:case>/volume/<str:level>/",
         adjudication.ReviewVolume.as_view(), name="studies-review-volume"),
    # Exports and detector predictions (studies/api/exports.py).
    path("studies/<slug:slug>/export/reference_set.<str:fmt>", exports.ReferenceSetExport.as_view(),
         name="studies-export-reference"),
    path("studies/<slug:slug>/export/events.csv", exports.EventsExport.as_view(),
         name="studies-export-events"),
    path("studies/<slug:slug>/export/analysis/<str:name>.csv",
         exports.AnalysisTableExport.as_view(), name="studies-export-table"),
    path("studies/<slug:slug>/export/archive.zip", exports.ArchiveExport.as_view(),
         name="studies-export-archive"),
    path("studies/<slug:slug>/predictions/", exports.PredictionsUpload.as_view(),
         name="studies-predictions"),
]

# The coordinator's dashboard (studies/api/dashboard.py).
from . import dashboard  # noqa: E402

urlpatterns += [
    path(
        "studies/<slug:slug>/analysis/",
        dashboard.StudyAnalysis.as_view(),
        name="studies-study-analysis",
    ),
]
