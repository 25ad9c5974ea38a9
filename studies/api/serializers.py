"""Input schemas for the API (validation and the OpenAPI description)."""

from __future__ import annotations

from rest_framework import serializers

from ..constants import EventKind


class EventInputSerializer(serializers.Serializer):
    client_event_id = serializers.UUIDField()
    client_time = serializers.DateTimeField()
    landmark = serializers.CharField(max_length=32)
    kind = serializers.ChoiceField(choices=EventKind.choices)
    x_mm = serializers.FloatField(required=False, allow_null=True)
    y_mm = serializers.FloatField(required=False, allow_null=True)
    z_mm = serializers.FloatField(required=False, allow_null=True)
    confidence = serializers.IntegerField(required=False, allow_null=True, min_value=1, max_value=3)
    base_version = serializers.IntegerField(
        min_value=0,
        help_text="The read's version this action was made on (0 before any event; each "
        "accepted event adds 1). A stale version is refused with 409, so a second tab or "
        "machine cannot silently overwrite; a retried client_event_id is answered first.",
    )


class ActivitySerializer(serializers.Serializer):
    seconds = serializers.FloatField(min_value=0, max_value=600)


class EventResultSerializer(serializers.Serializer):
    created = serializers.BooleanField()
    version = serializers.IntegerField()
    placement = serializers.DictField(allow_null=True)


class ErrorSerializer(serializers.Serializer):
    error = serializers.CharField()
