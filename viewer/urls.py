from __future__ import annotations

from django.contrib.auth import views as auth_views
from django.urls import include, path

from . import account_views, adjudication_views, setup_views, views

urlpatterns = [
    path("", views.home, name="viewer-home"),
    path(
        "login/",
        auth_views.LoginView.as_view(
            template_name="viewer/login.html", redirect_authenticated_user=True
        ),
        name="viewer-login",
    ),
    path("logout/", auth_views.LogoutView.as_view(), name="viewer-logout"),
    path("account/password/", account_views.PasswordChange.as_view(),
         name="viewer-password-change"),
    path("studies/<slug:slug>/", views.study_detail, name="viewer-study"),
    path("read/<uuid:code>/", views.read_page, name="viewer-read"),
    # The coordinator's set-up pages (viewer/setup_views.py).
    path("new-study/", setup_views.study_new, name="viewer-study-new"),
    path("studies/<slug:slug>/edit/", setup_views.study_edit, name="viewer-study-edit"),
    path("studies/<slug:slug>/protocol/", setup_views.study_protocol, name="viewer-study-protocol"),
    path(
        "studies/<slug:slug>/protocol/export/<str:fmt>/",
        setup_views.study_protocol_export,
        name="viewer-study-protocol-export",
    ),
    path("studies/<slug:slug>/members/", setup_views.study_members, name="viewer-study-members"),
    path("studies/<slug:slug>/members/remove/", setup_views.study_member_remove,
         name="viewer-study-member-remove"),
    path("studies/<slug:slug>/preview/", setup_views.study_preview, name="viewer-study-preview"),
    path("studies/<slug:slug>/open/", setup_views.study_open, name="viewer-study-open"),
    path("studies/<slug:slug>/close/", setup_views.study_close, name="viewer-study-close"),
]

# The coordinator's results dashboard and report (viewer/dashboard_views.py).
from . import dashboard_views  # noqa: E402

urlpatterns += [
    path("studies/<slug:slug>/results/", dashboard_views.dashboard, name="viewer-dashboard"),
    path("studies/<slug:slug>/results/run/", dashboard_views.dashboard_run,
         name="viewer-dashboard-run"),
    path("studies/<slug:slug>/results/figures/<str:kind>.svg", dashboard_views.dashboard_figure,
         name="viewer-dashboard-figure"),
    path("studies/<slug:slug>/results/tables/<str:name>.csv", dashboard_views.dashboard_csv,
         name="viewer-dashboard-csv"),
    path("studies/<slug:slug>/report/", dashboard_views.report, name="viewer-report"),
    path("studies/<slug:slug>/report.pdf", dashboard_views.report_pdf, name="viewer-report-pdf"),
    # Adjudication, exports and detector predictions (viewer/adjudication_views.py).
    path("studies/<slug:slug>/adjudication/", adjudication_views.adjudication_queue,
         name="viewer-adjudication"),
    path("studies/<slug:slug>/review/<uuid:case>/<str:landmark>/", adjudication_views.review,
         name="viewer-review"),
    path("studies/<slug:slug>/exports/", adjudication_views.exports_page, name="viewer-exports"),
    path("studies/<slug:slug>/predictions/", adjudication_views.predictions_page,
         name="viewer-predictions"),
]

# The coordinator's audit log (viewer/audit_views.py).
from . import audit_views  # noqa: E402

urlpatterns += [
    path("studies/<slug:slug>/audit/", audit_views.study_audit, name="viewer-study-audit"),
    path("studies/<slug:slug>/audit.csv", audit_views.study_audit_csv,
         name="viewer-study-audit-csv"),
]

urlpatterns += [path("", include("viewer.upload_urls"))]
