from __future__ import annotations

from django.contrib import admin
from django.urls import include, path
from django.views.decorators.http import require_safe
from drf_spectacular.views import SpectacularAPIView, SpectacularSwaggerSplitView

urlpatterns = [
    path("admin/", admin.site.urls),
    path("api/v1/", include("studies.api.urls")),
    path("api/schema/", SpectacularAPIView.as_view(), name="studies-schema"),
    path(
        "api/docs/",
        # GET and HEAD only (the HTML renderer cannot render other replies); the split view
        # serves its script from a URL, as the Content-Security-Policy requires.
        require_safe(SpectacularSwaggerSplitView.as_view(url_name="studies-schema")),
        name="studies-docs",
    ),
    path("", include("viewer.urls")),
]
