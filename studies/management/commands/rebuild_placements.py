"""Recompute current placements from the events table (or, with --check, compare only)."""

from __future__ import annotations

from django.core.management.base import BaseCommand, CommandError

from studies.models import Study
from studies.services.rebuild import find_mismatches, rebuild_placements


class Command(BaseCommand):
    help = "Rebuild placements from events; --check reports mismatches and changes nothing."

    def add_arguments(self, parser) -> None:
        parser.add_argument("--check", action="store_true", help="report only; exit 1 on mismatch")
        parser.add_argument("--study", help="limit to one study (slug)")

    def handle(self, *args, **options) -> None:
        study = None
        if options["study"]:
            study = Study.objects.filter(slug=options["study"]).first()
            if study is None:
                raise CommandError(f"no study with slug {options['study']!r}")
        if options["check"]:
            mismatches = find_mismatches(study)
            for m in mismatches:
                self.stdout.write(
                    f"mismatch: read {m.read} landmark {m.landmark}: "
                    f"stored {m.stored} events say {m.from_events}"
                )
            if mismatches:
                raise CommandError(f"{len(mismatches)} placement(s) differ from their events")
            self.stdout.write("placements match events: no mismatch")
            return
        fixed = rebuild_placements(study)
        self.stdout.write(f"rebuilt placements from events: {fixed} row(s) corrected")
