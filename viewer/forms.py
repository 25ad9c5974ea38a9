"""Forms of the coordinator's set-up pages.

Forms only parse and check what was typed; the services decide and store. Every error
message quotes the value it refuses.
"""

from __future__ import annotations

import math
from pathlib import PurePath

from django import forms
from django.contrib.auth import get_user_model
from django.forms import formset_factory

from studies.constants import ConsensusMethod, Role
from studies.services.protocol_io import CODE_MAX, CODE_PATTERN, NAME_MAX

MAX_READERS_PER_CASE = 50
MAX_PROTOCOL_FILE_BYTES = 1 << 20


def _number(value: float) -> str:
    return f"{value:g}"


class DesignForm(forms.Form):
    """The study design: readers per case, repeat reads, washout, seed, tolerance, adaptive."""

    readers_per_case = forms.IntegerField(
        label="Readers per case (k)", help_text="How many readers read each case."
    )
    repeat_fraction = forms.FloatField(
        label="Repeat fraction", help_text="Fraction (0 to 1) of each reader's cases read again."
    )
    washout_days = forms.FloatField(
        label="Washout (days)", help_text="Days between a first read and its repeat."
    )
    seed = forms.IntegerField(label="Randomisation seed", help_text="The same seed, the same plan.")
    tolerance_mm = forms.FloatField(
        label="Agreement tolerance (mm)",
        help_text="Readers' points further apart than this are flagged.",
    )
    adaptive_reads = forms.BooleanField(
        label="Adaptive extra reads",
        required=False,
        help_text="Add a reader to cases whose readers disagree.",
    )
    max_readers_per_case = forms.IntegerField(
        label="Maximum readers per case",
        help_text="Cap on readers per case with adaptive extra reads.",
    )
    consensus_method = forms.ChoiceField(label="Consensus point", choices=ConsensusMethod.choices)

    def clean_readers_per_case(self) -> int:
        k = self.cleaned_data["readers_per_case"]
        if not 1 <= k <= MAX_READERS_PER_CASE:
            raise forms.ValidationError(
                f"Readers per case must be from 1 to {MAX_READERS_PER_CASE}, got {k}."
            )
        return k

    def clean_repeat_fraction(self) -> float:
        fraction = self.cleaned_data["repeat_fraction"]
        if not (math.isfinite(fraction) and 0.0 <= fraction <= 1.0):
            raise forms.ValidationError(
                f"The repeat fraction must be between 0 and 1, got {_number(fraction)}."
            )
        return fraction

    def clean_washout_days(self) -> float:
        days = self.cleaned_data["washout_days"]
        if not (math.isfinite(days) and days >= 0):
            raise forms.ValidationError(f"Washout days cannot be negative, got {_number(days)}.")
        return days

    def clean_seed(self) -> int:
        seed = self.cleaned_data["seed"]
        if seed < 0 or seed >= 2**63:
            raise forms.ValidationError(f"The seed must be a whole number >= 0, got {seed}.")
        return seed

    def clean_tolerance_mm(self) -> float:
        tolerance = self.cleaned_data["tolerance_mm"]
        if not (math.isfinite(tolerance) and tolerance > 0):
            raise forms.ValidationError(
                f"The tolerance must be a positive number of mm, got {_number(tolerance)}."
            )
        return tolerance

    def clean_max_readers_per_case(self) -> int:
        cap = self.cleaned_data["max_readers_per_case"]
        if not 1 <= cap <= MAX_READERS_PER_CASE:
            raise forms.ValidationError(
                f"The maximum must be from 1 to {MAX_READERS_PER_CASE}, got {cap}."
            )
        return cap

    def clean(self) -> dict:
        data = super().clean()
        k, cap = data.get("readers_per_case"), data.get("max_readers_per_case")
        if k is not None and cap is not None and cap < k:
            self.add_error(
                "max_readers_per_case",
                f"The maximum readers per case ({cap}) cannot be below readers per case ({k}).",
            )
        return data

    def design(self) -> dict:
        """The cleaned design parameters, as the services take them."""
        return {name: self.cleaned_data[name] for name in DesignForm.base_fields}


class DetailsForm(forms.Form):
    """A study's name and description (editable in any status)."""

    name = forms.CharField(max_length=200)
    description = forms.CharField(widget=forms.Textarea(attrs={"rows": 3}), required=False)


class NewStudyForm(DetailsForm, DesignForm):
    """Everything a new draft study needs."""

    slug = forms.SlugField(
        label="Short name",
        max_length=64,
        help_text="Letters, digits and hyphens; used in the study's web address.",
    )

    field_order = ["name", "slug", "description"]

    def clean_slug(self) -> str:
        return self.cleaned_data["slug"].lower()


class StudyEditForm(DetailsForm, DesignForm):
    """Details always; the design only while the study is a draft (else shown, not editable)."""

    def __init__(self, *args, design_editable: bool = True, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        if not design_editable:
            for name in DesignForm.base_fields:
                self.fields[name].disabled = True


class LandmarkForm(forms.Form):
    """One row of the protocol editor; a row with no code and no name is left out."""

    code = forms.CharField(max_length=CODE_MAX, required=False)
    name = forms.CharField(max_length=NAME_MAX, required=False)
    description = forms.CharField(required=False)
    may_be_absent = forms.BooleanField(required=False, label="May be absent")
    order = forms.IntegerField(required=False)

    def clean_code(self) -> str:
        code = self.cleaned_data["code"].strip()
        if code and not CODE_PATTERN.match(code):
            raise forms.ValidationError(
                f"Code {code!r}: use letters, digits, '_', '-' or '.', starting with a letter "
                "or digit."
            )
        return code

    def clean_order(self) -> int | None:
        order = self.cleaned_data["order"]
        if order is not None and order < 0:
            raise forms.ValidationError(f"The order must be 0 or more, got {order}.")
        return order

    def clean(self) -> dict:
        data = super().clean()
        if not data.get("code") and (data.get("name") or data.get("description")):
            self.add_error("code", "Every landmark needs a code.")
        return data


class BaseLandmarkFormSet(forms.BaseFormSet):
    def clean(self) -> None:
        if any(self.errors):
            return
        seen: dict[str, int] = {}
        for number, form in enumerate(self.forms, start=1):
            if self.can_delete and self._should_delete_form(form):
                continue
            code = form.cleaned_data.get("code")
            if not code:
                continue
            if code in seen:
                raise forms.ValidationError(
                    f"Duplicate landmark code {code!r} (rows {seen[code]} and {number})."
                )
            seen[code] = number
        if not seen:
            raise forms.ValidationError("A protocol needs at least one landmark.")

    def items(self) -> list[dict]:
        """The kept rows as landmark items, ordered by their order (then their row)."""
        kept = [
            form.cleaned_data
            for form in self.forms
            if form.cleaned_data.get("code")
            and not (self.can_delete and self._should_delete_form(form))
        ]
        items = [
            {
                "code": row["code"],
                "name": row["name"].strip() or row["code"],
                "description": row["description"].strip(),
                "may_be_absent": row["may_be_absent"],
                "order": row["order"] if row["order"] is not None else position,
            }
            for position, row in enumerate(kept)
        ]
        return sorted(items, key=lambda item: item["order"])


LandmarkFormSet = formset_factory(
    LandmarkForm, formset=BaseLandmarkFormSet, extra=3, can_delete=True, max_num=500
)


class NewVersionForm(forms.Form):
    """The explicit step that changes an open study's protocol: a new protocol version."""

    new_version = forms.IntegerField(widget=forms.HiddenInput, required=False)
    confirm = forms.BooleanField(required=False)

    def __init__(self, *args, current_version: int, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        self.current_version = current_version
        self.fields["new_version"].initial = current_version + 1
        self.fields["confirm"].label = (
            f"Create protocol version {current_version + 1} (reads already opened keep "
            f"version {current_version})"
        )

    def clean(self) -> dict:
        data = super().clean()
        wanted = self.current_version + 1
        if not data.get("confirm"):
            raise forms.ValidationError(
                f"This study is open: its protocol cannot be edited in place. Tick "
                f"'Create protocol version {wanted}' to change it. Nothing was changed."
            )
        if data.get("new_version") != wanted:
            raise forms.ValidationError(
                f"The protocol changed while this page was open (it is now version "
                f"{self.current_version}); reload the page. Nothing was changed."
            )
        return data


class ProtocolImportForm(forms.Form):
    """A protocol file to replace the current protocol (CSV or JSON, by its name)."""

    file = forms.FileField(label="Protocol file (.csv or .json)")

    def clean_file(self):
        upload = self.cleaned_data["file"]
        suffix = PurePath(upload.name).suffix.lower().lstrip(".")
        if suffix not in ("csv", "json"):
            raise forms.ValidationError(
                f"The file {upload.name!r} is neither .csv nor .json; export one to see the form."
            )
        if upload.size > MAX_PROTOCOL_FILE_BYTES:
            raise forms.ValidationError(
                f"The file {upload.name!r} is {upload.size} bytes; the limit is "
                f"{MAX_PROTOCOL_FILE_BYTES}."
            )
        return upload

    def format_and_text(self) -> tuple[str, str]:
        upload = self.cleaned_data["file"]
        fmt = PurePath(upload.name).suffix.lower().lstrip(".")
        raw = upload.read()
        try:
            return fmt, raw.decode("utf-8")
        except UnicodeDecodeError as error:
            raise forms.ValidationError(
                f"The file {upload.name!r} is not UTF-8 text (byte {error.start})."
            ) from None


class MemberForm(forms.Form):
    """Give an existing user a role in the study."""

    username = forms.CharField(max_length=150)
    role = forms.ChoiceField(choices=Role.choices)

    def clean_username(self):
        username = self.cleaned_data["username"].strip()
        user = get_user_model().objects.filter(username=username, is_active=True).first()
        if user is None:
            raise forms.ValidationError(
                f"There is no active user {username!r}; an administrator creates accounts."
            )
        return user


class PreviewForm(forms.Form):
    """Assumptions of the design preview (from the query string)."""

    minutes_per_read = forms.FloatField(
        label="Minutes per read",
        initial=5.0,
        required=False,
        help_text="Expected time to read one case.",
    )
    sd_axis_mm = forms.FloatField(
        label="Reader SD per axis (mm)",
        initial=1.5,
        required=False,
        help_text="Expected spread of one reader's points along each axis.",
    )

    def _given(self, name: str) -> float:
        value = self.cleaned_data[name]
        return self.fields[name].initial if value is None else value

    def clean_minutes_per_read(self) -> float:
        minutes = self._given("minutes_per_read")
        if not (math.isfinite(minutes) and 0 < minutes <= 24 * 60):
            raise forms.ValidationError(
                f"Minutes per read must be above 0 and at most a day, got {_number(minutes)}."
            )
        return minutes

    def clean_sd_axis_mm(self) -> float:
        sd = self._given("sd_axis_mm")
        if not (math.isfinite(sd) and 0 <= sd <= 1000):
            raise forms.ValidationError(f"The SD must be from 0 to 1000 mm, got {_number(sd)}.")
        return sd
