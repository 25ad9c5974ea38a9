"""The signed-in user's own account: changing their password."""

from __future__ import annotations

from django.contrib import messages
from django.contrib.auth import views as auth_views
from django.urls import reverse_lazy

from audit import log as audit
from audit.models import AuditKind


class PasswordChange(auth_views.PasswordChangeView):
    """Django's password change (old password, the configured validators), audited.

    The view keeps the current session signed in and ends the user's other sessions
    (Django rotates the session auth hash).
    """

    template_name = "viewer/password_change.html"
    success_url = reverse_lazy("viewer-home")

    def form_valid(self, form):
        response = super().form_valid(form)
        audit.record(AuditKind.PASSWORD_CHANGED, actor=self.request.user, request=self.request)
        messages.success(self.request, "Your password was changed.")
        return response
