#!/usr/bin/env python
"""Django's command-line utility for cairn."""

from __future__ import annotations

import os
import sys


def main() -> None:
    os.environ.setdefault("DJANGO_SETTINGS_MODULE", "cairn.settings")
    from django.core.management import execute_from_command_line

    from cairn.startup import check_settings

    check_settings()
    execute_from_command_line(sys.argv)


if __name__ == "__main__":
    main()
