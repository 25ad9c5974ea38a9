"""On PostgreSQL, a trigger refuses UPDATE and DELETE on the placement events table."""

from django.db import migrations

CREATE = """
CREATE OR REPLACE FUNCTION studies_events_append_only() RETURNS trigger AS $$
BEGIN
    RAISE EXCEPTION USING MESSAGE = 'placement events are append-only (' || TG_OP || ' refused)';
END;
$$ LANGUAGE plpgsql;
CREATE TRIGGER studies_placementevent_append_only
    BEFORE UPDATE OR DELETE ON studies_placementevent
    FOR EACH ROW EXECUTE FUNCTION studies_events_append_only();
"""
DROP = """
DROP TRIGGER IF EXISTS studies_placementevent_append_only ON studies_placementevent;
DROP FUNCTION IF EXISTS studies_events_append_only();
"""


def forwards(apps, schema_editor):
    if schema_editor.connection.vendor == "postgresql":
        schema_editor.execute(CREATE)


def backwards(apps, schema_editor):
    if schema_editor.connection.vendor == "postgresql":
        schema_editor.execute(DROP)


class Migration(migrations.Migration):
    dependencies = [("studies", "0001_initial")]
    operations = [migrations.RunPython(forwards, backwards)]
