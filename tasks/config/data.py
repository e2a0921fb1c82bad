"""Sections about the data coming in: paths, input columns and rules, scale, the window."""

from __future__ import annotations

from typing import Literal

from pydantic import Field, model_validator

from tasks.config.base import _Section

#: URI schemes ``pyarrow.fs.FileSystem.from_uri`` understands (pyarrow's filesystem documentation).
SHARED_SCHEMES = ("file", "s3", "gs", "gcs", "hdfs", "viewfs", "abfs", "abfss")


class PathsConfig(_Section):
    logs: str = Field("sample_parquet", description="Where daily logs are read: <logs>/dt=YYYY-MM-DD/*.parquet. "
                      "Local path or pyarrow.fs URI. Overridden by --logs / TAREWISE_LOGS.")
    workspace: str = Field(".tarewise", description="Where tarewise keeps all its state: a local or mounted "
                           "POSIX folder. Overridden by --workspace / TAREWISE_WORKSPACE.")
    shared: str = Field("", description="Optional shared copy of the store, versions and live pointer on an object "
                        "store or another folder: a pyarrow.fs URI (s3://bucket/prefix?region=..., gs://bucket/"
                        "prefix, file:///path) or a path. Brought up to date after every night (live pointer "
                        "last); a new workspace restores from it. Empty: none. Overridden by --shared / "
                        "TAREWISE_SHARED.")

    @model_validator(mode="after")
    def _shared_scheme(self) -> "PathsConfig":
        if "://" in self.shared:
            scheme = self.shared.split("://", 1)[0].lower()
            if scheme not in SHARED_SCHEMES:
                raise ValueError(f"paths.shared = {self.shared!r}: unknown scheme {scheme!r}; use one of "
                                 f"{', '.join(SHARED_SCHEMES)} or a folder path")
        shared, workspace = self.shared.removeprefix("file://"), self.workspace.removeprefix("file://")
        if shared and "://" not in shared and "://" not in workspace:
            from tasks.workspace import overlaps
            if overlaps(shared, workspace):
                raise ValueError(f"paths.shared = {self.shared!r} overlaps paths.workspace = {self.workspace!r}; "
                                 "the shared copy must be a folder outside the workspace")
        return self


class ColumnsConfig(_Section):
    """Names of the input columns in the logs, mapped to tarewise's own names."""
    user_id: str = Field("user_id", min_length=1, description="Column holding the user id (string or integer).")
    item_id: str = Field("item_id", min_length=1, description="Column holding the item id (string or integer).")
    rating: str = Field("rating", min_length=1, description="Column holding the rating (number on the scale).")
    event_time: str = Field("event_time", min_length=1, description="Column holding the event time (UTC).")
    source: str = Field("source", min_length=1, description="Column saying organic or probe.")

    @model_validator(mode="after")
    def _distinct(self) -> "ColumnsConfig":
        # Two keys naming one column pass every row check (user = item on every row): refuse it here.
        seen: dict[str, str] = {}
        for key, column in self:
            if column in seen:
                raise ValueError(f"input.columns.{seen[column]} and input.columns.{key} both name the column "
                                 f"{column!r}; each needs a column of its own")
            seen[column] = key
        return self


class InputConfig(_Section):
    columns: ColumnsConfig = ColumnsConfig()
    organic_label: str = Field("organic", min_length=1, description="`source` value of organic ratings.")
    probe_label: str = Field("probe", min_length=1, description="`source` value of probe ratings.")
    missing_partition: Literal["error", "skip"] = Field(
        "error", description="What a run does when its date's partition is absent.")
    max_rejected_share: float = Field(0.05, ge=0.0, le=1.0,
                                      description="Fail the run before training when more rows than this are rejected.")
    max_future_seconds: int = Field(3_600, ge=0, description="Allowance (s) around the run date: rows whose event_time "
                                    "lies further than this after its end (future) or before its start (wrong-day "
                                    "partition) are quarantined; rows within it are kept (late-flushed events).")
    max_id_length: int = Field(256, ge=1, le=65_536, description="Longer ids are quarantined.")

    @model_validator(mode="after")
    def _labels_differ(self) -> "InputConfig":
        if self.organic_label == self.probe_label:
            raise ValueError("input.organic_label and input.probe_label must differ")
        return self


class ScaleConfig(_Section):
    min: float = Field(1.0, description="Lowest rating on the scale.")
    max: float = Field(5.0, description="Highest rating on the scale.")
    step: float = Field(1.0, ge=0.0, description="Rating step (1 for whole stars); 0 means continuous.")

    @model_validator(mode="after")
    def _ordered(self) -> "ScaleConfig":
        if not self.min < self.max:
            raise ValueError(f"scale.min ({self.min}) must be below scale.max ({self.max})")
        if self.step > 0:
            n = (self.max - self.min) / self.step
            if abs(n - round(n)) > 1e-9:
                raise ValueError("scale.step must divide scale.max - scale.min")
        return self

    @property
    def levels(self) -> list[float]:
        """Allowed rating values when a step is set (else the two ends)."""
        if self.step <= 0:
            return [self.min, self.max]
        n = int(round((self.max - self.min) / self.step))
        return [self.min + k * self.step for k in range(n + 1)]


class WindowConfig(_Section):
    days: int = Field(30, ge=1, le=3650, description="Training uses the stored ratings of this many days up to the run date.")
