"""Import scans (NIfTI files, DICOM series; files, folders or zips) into a study."""

from __future__ import annotations

from django.core.management.base import BaseCommand, CommandError

from studies.models import Study
from studies.services.ingest import (
    DUPLICATE,
    IMPORTED,
    REFUSED,
    WOULD_IMPORT,
    ImportOptions,
    Outcome,
    import_paths,
)

_BAR_WIDTH = 30


class Command(BaseCommand):
    help = (
        "Import NIfTI files and DICOM series from files, folders (recursive) or zips into a "
        "study. Prints a progress bar on stderr and a summary table at the end."
    )

    def add_arguments(self, parser) -> None:
        parser.add_argument("study", help="the study's slug")
        parser.add_argument("paths", nargs="+", help="files, folders or zip archives")
        parser.add_argument(
            "--dry-run",
            action="store_true",
            help="check and report only; store nothing (no pixels are read)",
        )
        parser.add_argument(
            "--volume",
            type=int,
            default=None,
            metavar="N",
            help="for 4D NIfTI files, import volume N (0-based)",
        )
        parser.add_argument(
            "--series",
            default=None,
            metavar="UID",
            help="import only this DICOM series (its UID or listing number)",
        )
        parser.add_argument(
            "--allow-burned-in",
            action="store_true",
            help="import images marked Burned In Annotation = YES (checked "
            "by you for identifying text)",
        )

    def _progress(self, done: int, total: int) -> None:
        filled = _BAR_WIDTH * done // total if total else _BAR_WIDTH
        bar = "#" * filled + "." * (_BAR_WIDTH - filled)
        end = "\n" if done == total else ""
        self.stderr.write(f"\r[{bar}] {done}/{total} volumes", ending=end)
        self.stderr.flush()

    def _table(self, outcomes: list[Outcome]) -> None:
        rows = [(o.status, o.source, o.detail.replace("\n", "\n" + " " * 16)) for o in outcomes]
        width = min(max((len(r[1]) for r in rows), default=6), 72)
        self.stdout.write(f"{'result':<14}  {'source':<{width}}  detail")
        for status, source, detail in rows:
            shown = source if len(source) <= width else f"{source[:24]}...{source[-(width - 27) :]}"
            self.stdout.write(f"{status:<14}  {shown:<{width}}  {detail}")
        counts = {
            s: sum(o.status == s for o in outcomes)
            for s in (IMPORTED, WOULD_IMPORT, DUPLICATE, REFUSED)
        }
        self.stdout.write(
            f"\nimported {counts[IMPORTED]}, skipped as duplicate {counts[DUPLICATE]}, "
            f"refused {counts[REFUSED]}"
            + (f", would import {counts[WOULD_IMPORT]} (dry run)" if counts[WOULD_IMPORT] else "")
        )

    def handle(self, *args, **options) -> None:
        study = Study.objects.filter(slug=options["study"]).first()
        if study is None:
            raise CommandError(f"no study with slug {options['study']!r}")
        if options["volume"] is not None and options["volume"] < 0:
            raise CommandError(f"--volume must be 0 or more, got {options['volume']}")
        choices = ImportOptions(
            dry_run=options["dry_run"],
            volume_index=options["volume"],
            series=options["series"],
            allow_burned_in=options["allow_burned_in"],
        )
        outcomes = import_paths(study, options["paths"], choices, progress=self._progress)
        self._table(outcomes)
        refused = sum(o.status == REFUSED for o in outcomes)
        if refused:
            raise CommandError(f"{refused} input(s) refused; see the table above")
