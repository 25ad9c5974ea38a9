"""Django admin for coordinators with staff access. Events are read-only here too."""

from __future__ import annotations

from django.contrib import admin

from .models import AnalysisRun, Case, Landmark, Membership, Placement, PlacementEvent, Read, Study


class LandmarkInline(admin.TabularInline):
    model = Landmark
    extra = 0


class MembershipInline(admin.TabularInline):
    model = Membership
    extra = 0


@admin.register(Study)
class StudyAdmin(admin.ModelAdmin):
    list_display = ("name", "slug", "status", "readers_per_case", "repeat_fraction", "washout_days")
    list_filter = ("status",)
    inlines = [LandmarkInline, MembershipInline]


@admin.register(Case)
class CaseAdmin(admin.ModelAdmin):
    list_display = ("label", "pseudonym", "study", "modality", "created_at")
    list_filter = ("study",)
    readonly_fields = [f.name for f in Case._meta.fields]


@admin.register(Read)
class ReadAdmin(admin.ModelAdmin):
    list_display = ("pseudonym", "reader", "case", "read_number", "status", "worklist_position")
    list_filter = ("study", "status", "read_number")


class ReadOnlyAdmin(admin.ModelAdmin):
    def has_add_permission(self, request) -> bool:
        return False

    def has_change_permission(self, request, obj=None) -> bool:
        return False

    def has_delete_permission(self, request, obj=None) -> bool:
        return False


@admin.register(PlacementEvent)
class PlacementEventAdmin(ReadOnlyAdmin):
    list_display = ("read", "landmark", "kind", "x_mm", "y_mm", "z_mm", "server_time")
    list_filter = ("kind",)


@admin.register(Placement)
class PlacementAdmin(ReadOnlyAdmin):
    list_display = ("read", "landmark", "state", "x_mm", "y_mm", "z_mm")


@admin.register(AnalysisRun)
class AnalysisRunAdmin(ReadOnlyAdmin):
    list_display = ("study", "status", "progress", "requested_at", "finished_at")
