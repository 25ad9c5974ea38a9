"""Export a study's reference set, events, analysis tables and manifest into a folder."""

from __future__ import annotations

from django.core.management.base import BaseCommand, CommandError

from audit import log as audit
from audit.models import AuditKind
from studies.models import Study
from studies.services import exports
from studies.services.errors import ServiceError


class Command(BaseCommand):
    help = (
        "Write reference_set.csv/.json, events.csv, adjudication_events.csv, placements.csv, "
        "analysis/*.csv, parameters.json and manifest.json (SHA-256 of each file) into DIR, "
        "and with --archive also the study archive zip."
    )

    def add_arguments(self, parser) -> None:
        parser.add_argument("study", help="study slug")
        parser.add_argument("--out", required=True, metavar="DIR", help="output folder")
        parser.add_argument(
            "--archive", action="store_true", help="also write DIR/<study>-archive.zip"
        )

    def handle(self, *args, **options) -> None:
        study = Study.objects.filter(slug=options["study"]).first()
        if study is None:
            raise CommandError(f"no study with slug {options['study']!r}")
        try:
            names = exports.write_export(study, options["out"])
            if options["archive"]:
                path = exports.write_archive(study, f"{options['out']}/{study.slug}-archive.zip")
                names.append(path.name)
        except ServiceError as error:
            raise CommandError(str(error)) from None
        except OSError as error:
            raise CommandError(f"cannot write to {options['out']!r}: {error}") from None
        audit.record(AuditKind.EXPORT, username="(command line)", study=study,
                     folder=str(options["out"]), files=names)
        self.stdout.write(f"wrote {len(names)} files to {options['out']}: {', '.join(names)}")
