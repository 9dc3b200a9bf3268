"""The JSON request bodies of the REST service (pydantic models, also its OpenAPI schema).

A segment body mirrors what the file readers accept: ``time`` in days, ``flux`` on any scale,
``flux_err`` optional. JSON has no NaN: a ``null`` in ``flux`` or ``flux_err`` is a missing
point, dropped as NaN is in files. The physical validation (too few points, constant flux,
duplicate times, ...) is :func:`features.segment.segment_from_mapping`'s, so a segment posted
here and the same segment in a file give the same error codes.
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict, Field

from features.errors import ParameterError
from features.events import Ephemeris
from features.segment import Segment, segment_from_mapping
from service.errors import ServiceError

__all__ = ["EphemerisBody", "LabelBody", "SegmentBody", "to_ephemeris", "to_segment"]


class EphemerisBody(BaseModel):
    """A known ephemeris: no period is searched when it is given."""

    model_config = ConfigDict(extra="forbid")

    period: float = Field(..., description="Orbital period [days].", examples=[3.52])
    epoch: float = Field(..., description="Mid-time of one event [days, the segment's time "
                         "system].", examples=[1412.37])
    duration: float = Field(..., description="Event duration [days].", examples=[0.12])


class SegmentBody(BaseModel):
    """One light-curve segment to score."""

    model_config = ConfigDict(extra="forbid")

    id: str | None = Field(None, max_length=256, description="Segment id (echoed in the "
                           "result); default 'segment'.", examples=["LS-0042-s3"])
    time: list[float] = Field(..., description="Times [days], e.g. BJD - 2457000.")
    flux: list[float | None] = Field(..., description="Flux, any scale; null = missing point.")
    flux_err: list[float | None] | None = Field(
        None, description="1-sigma flux errors, same scale; null or absent = estimated.")
    ephemeris: EphemerisBody | None = None


class LabelBody(BaseModel):
    """A labelled segment for the group's own training set."""

    model_config = ConfigDict(extra="forbid")

    segment: SegmentBody
    label: str = Field(..., min_length=1, max_length=64, description="A class name: one of "
                       "the five or the group's own.", examples=["exocomet"])
    note: str | None = Field(None, max_length=4000)
    submitter: str | None = Field(None, max_length=256)


def to_segment(body: SegmentBody, *, max_points: int, id_required: bool = False) -> Segment:
    """Validate a segment body into a :class:`~features.segment.Segment`.

    Raises
    ------
    ServiceError
        ``too_many_points`` (more than ``max_points`` entries in ``time``) or
        ``invalid_request`` (no id where one is required).
    SegmentError
        Every code of :func:`features.segment.segment_from_mapping`.
    """
    n = len(body.time)
    if n > max_points:
        raise ServiceError("too_many_points",
                           f"the segment has {n} points; the limit is {max_points}")
    if id_required and not body.id:
        raise ServiceError("invalid_request", "segment.id is required")
    obj: dict[str, Any] = {"time": body.time, "flux": body.flux}
    if body.flux_err is not None:
        obj["flux_err"] = body.flux_err
    if body.id is not None:
        obj["id"] = body.id
    return segment_from_mapping(obj)


def to_ephemeris(body: EphemerisBody | None) -> Ephemeris | None:
    """The :class:`~features.events.Ephemeris` of a body (None when absent).

    Raises
    ------
    ParameterError
        ``invalid_ephemeris`` for a non-positive period or duration, a duration not shorter
        than the period, or non-finite values.
    """
    if body is None:
        return None
    try:
        return Ephemeris(period_days=body.period, epoch=body.epoch,
                         duration_days=body.duration)
    except ParameterError as exc:
        raise ParameterError("invalid_ephemeris", exc.detail) from exc
