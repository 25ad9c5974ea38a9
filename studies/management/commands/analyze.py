"""Request an analysis of a study (queued for a worker), or compute it here with --here."""

from __future__ import annotations

from django.core.management.base import BaseCommand, CommandError

from studies.models import Study
from studies.services.analysis_runs import execute, request_analysis


class Command(BaseCommand):
    help = "Analyse a study's submitted placements: queue a run, or compute it now with --here."

    def add_arguments(self, parser) -> None:
        parser.add_argument("study", help="study slug")
        parser.add_argument("--here", action="store_true", help="compute in this process")

    def handle(self, *args, **options) -> None:
        study = Study.objects.filter(slug=options["study"]).first()
        if study is None:
            raise CommandError(f"no study with slug {options['study']!r}")
        run = request_analysis(study)
        if options["here"]:
            run = execute(run.pk) or run
            run.refresh_from_db()
        self.stdout.write(f"analysis run {run.code}: {run.status} {run.reason}".rstrip())
        if run.status == "failed":
            raise CommandError(run.reason)
