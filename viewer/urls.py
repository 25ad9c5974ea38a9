from __future__ import annotations

from django.contrib.auth import views as auth_views
from django.urls import path

from . import views

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
    path("studies/<slug:slug>/", views.study_detail, name="viewer-study"),
    path("read/<uuid:code>/", views.read_page, name="viewer-read"),
]
