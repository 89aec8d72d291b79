"""survey.toml: the schema, its defaults and validation with helpful one-line messages.

One schema for every survey kind. Each table of the file is one pydantic model below; unknown keys
are refused with the nearest valid key suggested, wrong types name the key and the expected type.
Stage sections hold the options of one stage each; a stage reads only its own section (plus
``survey``), and the pipeline hashes exactly that to decide whether the stage must re-run.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import tomllib
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from .errors import ConfigError

#: Canonical column names an input column can be mapped to (design.md, "Readings table").
CANONICAL_COLUMNS = (
    "time",
    "date",
    "longitude",
    "latitude",
    "easting",
    "northing",
    "height",
    "line",
    "line_type",
    "total_field",
    "mag_north",
    "mag_east",
    "mag_down",
    "reading",
    "station",
    "instrument_height",
    "loop",
    "elevation",
    # gravimeter exports: the meter's standard deviation of a reading and the tide correction
    # the meter has already added to it (mGal, converted like reading)
    "reading_sd",
    "meter_tide",
)

from .units import COLUMN_QUANTITY, UNIT_FACTORS  # noqa: E402,F401  (re-exported)

KINDS = ("magnetic", "gravity", "observatory")


def unit_factor(name: str, units: dict[str, str]) -> float:
    """Factor taking column ``name`` from its declared unit (``units``) to potfield's unit."""
    quantity = COLUMN_QUANTITY.get(name)
    if quantity is None or name not in units:
        return 1.0
    return float(UNIT_FACTORS[quantity][units[name]])


class RenamedKeyWarning(FutureWarning):
    """An old name in survey.toml, still accepted; the message names the new one."""


def warn_renamed(where: str, old: str, new: str) -> None:
    """One-line warning that an old survey.toml name was used (it still works)."""
    import warnings

    warnings.warn(
        f"survey.toml {where}: '{old}' is an old name, still accepted; use '{new}'",
        RenamedKeyWarning,
        stacklevel=2,
    )


#: [grid] old key -> (new key, {old value: new value}).
GRID_ALIASES = {
    "depth_type": ("source_layer", {"relative": "follow_drape", "constant": "flat"}),
    "depth_factors": ("trial_depths", {}),
    "dampings": ("trial_dampings", {}),
}


def renamed_keys(data, section: str, aliases: dict) -> Any:
    """Map old keys (and values) of a section to the new ones, warning once per key."""
    if not isinstance(data, dict):
        return data
    data = dict(data)
    for old, (new, values) in aliases.items():
        if old in data:
            value = data.pop(old)
            if new in data:
                raise ValueError(f"'{old}' and '{new}' both given; keep only '{new}'")
            value = values.get(value, value) if isinstance(value, str) else value
            warn_renamed(f"[{section}]", old, new + (f' = "{value}"' if values else ""))
            data[new] = value
    return data


class Section(BaseModel):
    """Base of every section: unknown keys are errors, assignments are validated, and numbers
    must be finite (TOML's ``inf``/``nan`` are refused)."""

    model_config = ConfigDict(extra="forbid", validate_assignment=True, allow_inf_nan=False)


class SurveySection(Section):
    name: str = "unnamed survey"
    kind: Literal["magnetic", "gravity", "observatory"]
    #: CRS of the input coordinates: "EPSG:4326" (default), an EPSG code or a PROJ string.
    crs: str = "EPSG:4326"
    #: CRS of easting/northing in outputs; "auto" = UTM zone (WGS 84) of the survey centroid,
    #: also for projected input; "input" = keep the input CRS.
    output_crs: str = "auto"
    #: Height reference of the input heights: "ellipsoid" or "geoid" (then geoid_undulation).
    height_reference: Literal["ellipsoid", "geoid"] = "ellipsoid"
    #: Geoid undulation N (m) added to geoid heights to make them ellipsoidal (h = H + N); the
    #: Earth's geoid lies within about -110..+90 m of the ellipsoid (from memory), so |N| <= 200.
    geoid_undulation: float = Field(0.0, ge=-200.0, le=200.0)
    #: Spec profile name (configs/specs/NAME.toml) or a path relative to the survey folder.
    spec: str = "auto"
    #: Overrides of single spec values: {"noise_fourth_difference_nT" = 0.2, ...}
    spec_overrides: dict[str, float] = Field(default_factory=dict)

    @field_validator("crs", "output_crs", "spec")
    @classmethod
    def _not_blank(cls, value: str) -> str:
        if not value.strip():
            raise ValueError("must not be empty")
        return value


class TimeSection(Section):
    #: "iso" (ISO 8601 in the time column), "date_seconds" (date column + seconds of day in the
    #: time column) or "decimal_hours" (hours of day in the time column + date column or `date`),
    #: or a strftime pattern of the time column ("%Y/%m/%d %H:%M:%S", "%H%M%S", "%d/%m/%Y");
    #: see potfield.io.timefmt.
    format: str = "iso"
    #: Date for decimal_hours / date_seconds when the file has no date column (YYYY-MM-DD).
    date: str | None = None
    #: strftime pattern of the date column (e.g. "%d/%m/%Y"); None = YYYY-MM-DD, YYYY/MM/DD or
    #: YYYYMMDD.
    date_format: str | None = None
    #: Hours the recorded (zone-less) times are ahead of UTC: 10 for a logger on UTC+10.
    utc_offset_h: float = 0.0
    #: IANA time zone of the recorded times instead of utc_offset_h (follows daylight saving).
    timezone: str | None = None
    #: Seconds the instrument clock is ahead of the reference clock (GNSS or the base);
    #: subtracted from every time (the sign of the diurnal stage's time-offset estimate).
    clock_offset_s: float = 0.0

    @field_validator("format")
    @classmethod
    def _known_format(cls, value: str) -> str:
        from .io.timefmt import check_format

        return check_format(value)

    @field_validator("date")
    @classmethod
    def _iso_date(cls, value: str | None) -> str | None:
        return None if value is None else _check_date(value)


class StationFile(Section):
    """One station file of an observatory survey given as delimited text (not IAGA-2002)."""

    #: File name or glob pattern (relative to the survey folder, or a bare file name).
    file: str
    #: Station code (e.g. "ABC"), used as the line and station names.
    station: str
    #: Geodetic position (degrees) and elevation (m above mean sea level, as IAGA-2002).
    longitude: float
    latitude: float = Field(ge=-90, le=90)
    elevation: float = 0.0


class InputSection(Section):
    #: Files or glob patterns relative to the survey folder.
    files: list[str] = Field(default_factory=lambda: ["raw/*.csv"], min_length=1)
    #: "auto", ",", ";", "whitespace" or "\t".
    delimiter: str = "auto"
    #: Text encoding of the input files (any Python codec name). With the default utf-8, a file
    #: that is not valid UTF-8 is read as latin-1 and the run says so in a warning.
    encoding: str = "utf-8"
    #: Lines to skip at the top of each file before the header line.
    skip_rows: int = Field(0, ge=0)
    #: Values that mean "missing" in the input, besides empty fields.
    missing_values: list[str] = Field(default_factory=lambda: ["*", "NaN", "nan", "-99999", "99999"])
    #: Canonical name -> the input file's column name.
    columns: dict[str, str] = Field(default_factory=dict)
    #: Canonical name -> unit of that input column.
    units: dict[str, str] = Field(default_factory=dict)
    time: TimeSection = Field(default_factory=TimeSection)
    #: "auto" (ASEG-GDF2 for a .dat file with its .des beside it, IAGA-2002 for observatory files
    #: that start with its Format record, else delimited text), "delimited" or "aseg-gdf2".
    format: Literal["auto", "delimited", "aseg-gdf2"] = "auto"
    #: Leading lines starting with this are a comment block ("/" or "#"); the header line may
    #: be the last of them ("/ X Y MAG"). None = no comment block.
    comment: str | None = None
    #: Decimal mark of the numbers: "." or "," (decimal commas; then the delimiter is not ",").
    decimal: Literal[".", ","] = "."
    #: Input columns carried unchanged (as text) to the readings table as raw_<name>
    #: (e.g. ["Fid"] -> raw_Fid); the prefix keeps them apart from canonical names.
    keep_columns: list[str] = Field(default_factory=list)
    #: Observatory surveys with delimited station files: the station of each file and its
    #: position ([[input.stations]] tables).
    stations: list[StationFile] = Field(default_factory=list)

    @field_validator("files")
    @classmethod
    def _files_named(cls, value: list[str]) -> list[str]:
        if any(not f.strip() for f in value):
            raise ValueError('a file name is empty; give a file or glob pattern such as "raw/*.csv"')
        return value

    @field_validator("delimiter")
    @classmethod
    def _usable_delimiter(cls, value: str) -> str:
        return _check_delimiter(value)

    @field_validator("encoding")
    @classmethod
    def _known_encoding(cls, value: str) -> str:
        import codecs

        try:
            codecs.lookup(value)
        except LookupError:
            raise ValueError(f"unknown text encoding '{value}'; use e.g. utf-8, latin-1 or cp1252") from None
        return value

    @field_validator("columns")
    @classmethod
    def _known_columns(cls, value: dict[str, str]) -> dict[str, str]:
        for key in value:
            if key not in CANONICAL_COLUMNS:
                raise ValueError(_unknown(key, CANONICAL_COLUMNS, "canonical column"))
        return value

    @field_validator("units")
    @classmethod
    def _known_units(cls, value: dict[str, str]) -> dict[str, str]:
        for key, unit in value.items():
            if key not in COLUMN_QUANTITY:
                raise ValueError(_unknown(key, tuple(COLUMN_QUANTITY), "column with a unit"))
            allowed = UNIT_FACTORS[COLUMN_QUANTITY[key]]
            if unit not in allowed:
                raise ValueError(f"unit '{unit}' for {key} is not known; use one of {', '.join(allowed)}")
        return value


class LinesSection(Section):
    #: Names of the tie lines (as they appear in the line column).
    tie_lines: list[str] = Field(default_factory=list)
    #: Alternatively: line names matching this regular expression are tie lines.
    tie_pattern: str | None = None
    #: Alternatively: numeric line names >= this value are tie lines (common practice: 9000+).
    tie_min: float | None = None
    #: When there is no line column: start a new line when the time gap exceeds this (s).
    split_gap_s: float = Field(60.0, gt=0)


class CleanSection(Section):
    #: Spike test: rolling median window (samples) and threshold in robust sigmas (MAD * 1.4826).
    spike_window: int = Field(11, ge=3)
    spike_threshold: float = Field(6.0, gt=0)
    #: Minimum absolute spike size (field units) so a quiet line is not over-flagged.
    spike_min: float = Field(0.0, ge=0)
    #: Time gap (s) above which the reading after the gap is flagged; 0 = from sampling (5x median).
    max_time_gap_s: float = Field(0.0, ge=0)
    #: Distance gap (m) along line above which the reading after the gap is flagged; 0 = 5x median.
    max_distance_gap_m: float = Field(0.0, ge=0)
    #: Heights outside [min, max] (m) are flagged; None = no limit.
    height_min: float | None = None
    height_max: float | None = None
    #: Fourth difference normalised by 16 (so a spike of A gives 6A/16) when true.
    fourth_difference_normalised: bool = False
    #: Most readings the spike test may flag (fraction); beyond it only the strongest are kept
    #: and a warning says so (a higher rate means the test is measuring the signal).
    max_spike_fraction: float = Field(0.02, ge=0.0, le=1.0)
    #: Observatory minute data: smallest jump (nT) of a spike (first-difference test; keeps the
    #: natural minute-to-minute variation of quiet days from being flagged).
    observatory_spike_floor_nT: float = Field(3.0, ge=0.0)

    @model_validator(mode="after")
    def _height_band(self):
        if self.height_min is not None and self.height_max is not None and self.height_min >= self.height_max:
            raise ValueError(
                f"height_min {self.height_min:g} must be below height_max "
                f"{self.height_max:g} (fix: swap or correct them under [clean])"
            )
        return self


class BaseStation(Section):
    #: Name of the base (used in checks, tables and messages).
    name: str = Field(min_length=1)
    #: File (relative to the survey folder): delimited text or IAGA-2002 (.min/.sec/.iaga).
    file: str = Field(min_length=1)
    #: "auto" (IAGA-2002 when the first line is an IAGA-2002 'Format' record), "delimited", "iaga2002".
    format: Literal["auto", "delimited", "iaga2002"] = "auto"
    #: Position of the base (deg); None = from the IAGA-2002 header (required for delimited
    #: files when two or more bases are combined or the time offset is estimated).
    longitude: float | None = Field(None, ge=-180, le=360)
    latitude: float | None = Field(None, ge=-90, le=90)
    #: For delimited base files: canonical name -> file column (time, total_field, date).
    columns: dict[str, str] = Field(default_factory=dict)
    #: Unit of the base total_field column (nT, uT, pT, gamma).
    units: dict[str, str] = Field(default_factory=dict)
    #: Delimiter of a delimited file: "auto", ",", ";", "whitespace" or "\t".
    delimiter: str = "auto"
    #: Lines to skip at the top of a delimited file before its header line.
    skip_rows: int = Field(0, ge=0)
    #: Values meaning "missing" in a delimited file, besides empty fields.
    missing_values: list[str] = Field(default_factory=lambda: ["*", "NaN", "nan", "-99999", "99999"])
    #: Time format of a delimited file (as [input.time]).
    time: TimeSection = Field(default_factory=TimeSection)
    #: Seconds added to the base file's times to bring its clock to UTC (e.g. -3600 for a logger
    #: kept on UTC+1). Applied after time.utc_offset_h / time.clock_offset_s (which subtract).
    time_offset_s: float = 0.0
    #: Leading comment character of a delimited file's header block (as [input] comment).
    comment: str | None = None
    #: Decimal mark of a delimited file: "." or "," (decimal commas).
    decimal: Literal[".", ","] = "."

    @field_validator("delimiter")
    @classmethod
    def _usable_delimiter(cls, value: str) -> str:
        return _check_delimiter(value)


class DiurnalSection(Section):
    #: false = the diurnal stage passes the table through unchanged.
    enabled: bool = True
    #: Base magnetometers ([[diurnal.bases]] tables).
    bases: list[BaseStation] = Field(default_factory=list)
    #: Remote reference when there is no base: the coefficient table of an observatory-network
    #: run (its out/tables/coefficients.csv), evaluated at every reading by
    #: potfield.fields.harmonic.separation.external_field_at. The station table beside it
    #: (station_residuals.csv, with longitude/latitude) names the nearest station in the caution.
    remote_reference: str | None = None
    #: Interpolation of the base record to the readings' times.
    interpolation: Literal["linear", "cubic", "nearest"] = "linear"
    #: "median" (over the survey), "value" (datum_value) or "time" (base value at datum_time).
    #: With several bases the datum is set on the first base; the others are tied to it by
    #: their median level difference over the survey.
    datum: Literal["median", "value", "time"] = "median"
    #: Datum (nT) for datum = "value".
    datum_value: float | None = None
    #: Datum time (ISO 8601, UTC) for datum = "time".
    datum_time: str | None = None

    @field_validator("datum_time")
    @classmethod
    def _datum_time(cls, value: str | None) -> str | None:
        return None if value is None else _check_time(value)

    #: Two or more bases: "nearest" or "distance" (inverse-distance weights).
    combine: Literal["nearest", "distance"] = "nearest"
    #: Exponent p of the inverse-distance weights d**-p (combine = "distance").
    distance_power: float = Field(2.0, gt=0)
    #: Base gaps longer than this (s) flag the readings inside them.
    max_gap_s: float = Field(10.0, gt=0)
    #: Base spike test: running median window (samples), threshold (robust sigmas) and the
    #: smallest departure (nT) called a spike (the floor of the threshold, so samples within a
    #: few nT of the local median are never removed); spikes are removed from the base record.
    spike_window: int = Field(11, ge=3)
    spike_threshold: float = Field(6.0, gt=0)
    spike_min_nT: float = Field(3.0, ge=0)
    #: Base datum jumps: a level change larger than this (nT) across a recording gap or inside a
    #: record (robust two-window step test) is reported as a relocation / new set-up (warning).
    base_jump_nT: float = Field(20.0, gt=0)
    #: A base recording gap longer than this (s) starts a new base session. Every session (gaps
    #: and steps split them) is levelled to its own datum: its median over the survey, shifted
    #: by the same constant as the whole base's datum (datum = "value" or "time").
    session_gap_s: float = Field(1800.0, gt=0)
    #: Set-up transient: the first settle_s seconds of each session are flagged where they depart
    #: from the straight line through the next 2 x settle_s seconds (0 = no test).
    settle_s: float = Field(300.0, ge=0)
    #: Time offset estimate: survey readings within this distance (m) of a base (e.g. static
    #: records beside it before and after a flight) are cross-correlated with it after a
    #: running-mean high-pass of offset_highpass_s seconds, for lags up to offset_max_lag_s;
    #: passes shorter than offset_highpass_s are left out.
    offset_radius_m: float = Field(500.0, gt=0)
    offset_highpass_s: float = Field(60.0, gt=0)
    offset_max_lag_s: float = Field(30.0, ge=0)
    #: Delimited base files with a quality code per sample: the column holding it, and the codes
    #: accepted (compared as text after stripping); other samples are treated as missing.
    base_quality_column: str | None = None
    base_quality_accepted: list[str] = Field(default_factory=list)


class GravityBase(Section):
    #: Station id of the base, as written in the station column of the readings.
    station: str = Field(min_length=1)
    #: Absolute gravity at the base (mGal).
    gravity: float
    #: Standard deviation (mGal) of the base value, weighting it in the network adjustment;
    #: None = held fixed.
    sigma_mgal: float | None = Field(None, gt=0)

    @field_validator("station", mode="before")
    @classmethod
    def _station_text(cls, value):
        # a numeric station id (station = 101) means the same as "101"
        return str(value) if isinstance(value, int) and not isinstance(value, bool) else value


class DriftSection(Section):
    #: false = the readings are final observed gravity (mGal, e.g. a station list): no
    #: calibration, tide, drift or network adjustment; the drift stage is recorded as skipped.
    enabled: bool = True
    #: Calibration (interval) table for counter units: file with columns counter, mgal, factor.
    calibration_file: str | None = None
    #: Correct the Earth tide (Longman 1959) before the drift.
    tide: bool = True
    #: The gravimeter already added its own tide correction to the readings: true, false, or
    #: None = true when a meter_tide column is mapped and not all zero. Then potfield does not
    #: add a second tide correction (tide = 0; the meter's is kept in meter_tide).
    meter_tide_applied: bool | None = None
    #: Gravimetric factor 1 + h2 - 3/2 k2 applied to the rigid-Earth tide (common practice 1.16).
    gravimetric_factor: float = Field(1.16, gt=0, le=2)
    #: "linear" (per loop, first/last base), "piecewise" (through every base repeat) or "network".
    method: Literal["linear", "piecewise", "network"] = "network"
    #: Absolute gravity bases ([[drift.bases]] tables: station, gravity, optional sigma_mgal).
    bases: list[GravityBase] = Field(default_factory=list)
    #: Instrument height correction gradient (mGal/m; common practice 0.3086).
    free_air_gradient: float = Field(0.3086, ge=0, le=1)
    #: Tare: an abrupt step; times (ISO) at which a tare is allowed in the network adjustment.
    tares: list[str] = Field(default_factory=list)

    @field_validator("tares")
    @classmethod
    def _tare_times(cls, value: list[str]) -> list[str]:
        return [_check_time(t) for t in value]

    #: How readings are grouped into loops: "auto" (the loop column, else a mapped line column,
    #: else the local solar day at the mean longitude), "loop", "line" or "day".
    loops: Literal["auto", "loop", "line", "day"] = "auto"
    #: A priori standard deviation of one reading (mGal) for the network weights (common
    #: practice for a spring gravimeter: 0.01).
    reading_sigma_mgal: float = Field(0.01, gt=0)


class ReferenceSection(Section):
    #: false = the value is already an anomaly (data reduced elsewhere): taken as it is
    #: (magnetic: total_field [- diurnal]; gravity: observed gravity) as the anomaly; the
    #: reference stage is recorded as skipped.
    enabled: bool = True
    #: Magnetic and observatory: evaluate IGRF-14 at each reading's time (unset, the default),
    #: or at this one fixed date for all readings ("YYYY-MM-DD", UTC; 1900-01-01 .. 2030-01-01).
    igrf_date: str | None = None
    #: Gravity: normal-gravity ellipsoid.
    ellipsoid: Literal["WGS84", "GRS80"] = "WGS84"
    #: Gravity: reduction density (kg/m^3) for the Bouguer and terrain corrections.
    density: float = Field(2670.0, gt=0, le=10_000)
    #: Gravity: Bouguer correction as an infinite "slab" or a spherical "cap" to 166.735 km.
    bouguer: Literal["slab", "cap"] = "cap"
    #: Gravity: add the atmospheric correction (Hinze et al. 2005) to the free-air anomaly.
    atmospheric: bool = True
    #: Gravity: "first" (0.3086 mGal/m) or "second" order free-air correction in the anomaly.
    free_air_order: Literal["first", "second"] = "first"
    #: DEM for the terrain correction (NetCDF, GeoTIFF or x,y,z table), relative to the survey
    #: folder, and its CRS (overrides the CRS in the file; needed when the file has none).
    dem_file: str | None = None
    dem_crs: str | None = None
    #: Height datum of the DEM: "geoid" (orthometric; survey.geoid_undulation is added) or
    #: "ellipsoid".
    dem_height_reference: Literal["geoid", "ellipsoid"] = "geoid"
    #: Terrain correction outer radius (m) and radius of the full-resolution inner zone (m).
    terrain_radius_m: float = Field(166_700.0, gt=0)
    terrain_inner_radius_m: float = Field(2_000.0, ge=0)
    #: Coarser (block-averaged) DEM zones keep cell size <= distance / this ratio.
    terrain_far_ratio: float = Field(8.0, gt=0)
    #: Lower far prisms by d^2/(2R) (Earth curvature; terrain relative to the spherical cap).
    terrain_curvature: bool = True
    #: Warn when more than this fraction of the terrain disc around a station lacks DEM cover.
    terrain_missing_tolerance: float = Field(0.01, ge=0, le=1)
    #: True: readings stand on the ground, so a reading's own DEM cell takes the reading height
    #: (ground surveys); false: keep the DEM value there (airborne readings above the terrain).
    terrain_readings_on_ground: bool = True

    @field_validator("igrf_date")
    @classmethod
    def _igrf_date(cls, value: str | None) -> str | None:
        return None if value is None else _check_date(value)

    @model_validator(mode="after")
    def _terrain_zones(self):
        if self.terrain_inner_radius_m > self.terrain_radius_m:
            raise ValueError(
                f"terrain_inner_radius_m {self.terrain_inner_radius_m:g} exceeds "
                f"terrain_radius_m {self.terrain_radius_m:g} (fix: make the inner "
                "radius the smaller one under [reference])"
            )
        return self


class LevelSection(Section):
    #: Level lines at all; false copies the value into anomaly_levelled with zero correction.
    enabled: bool = True
    #: Traverse-line correction model: "constant", "linear" or "quadratic" in time.
    traverse_model: Literal["constant", "linear", "quadratic"] = "constant"
    #: "two_step" (ties to each other, then traverse lines to the ties; common practice) or
    #: "network" (all lines solved together in one least-squares network).
    method: Literal["two_step", "network"] = "two_step"
    #: Minimum crossovers per line for its own correction; fewer keeps the line's level.
    min_crossovers: int = Field(default=2, ge=1)
    #: Crossovers with |height difference| above this (m) are dropped; 0 = adaptive: median
    #: |dh| + height_gate_mads x 1.4826 MAD(|dh|), at least 10 m (robust; Huber 1981).
    max_height_difference_m: float = Field(default=0.0, ge=0.0)
    #: Robust standard deviations above the median |dh| of the adaptive height gate.
    height_gate_mads: float = Field(default=3.0, gt=0.0)
    #: Remove the height effect from each misclosure (vertical gradient estimated from the
    #: data x height difference) before levelling.
    height_correction: bool = True
    #: Lines with fewer than min_crossovers usable crossovers take the correction of the lines
    #: flown before and after them (interpolated in time) instead of none.
    neighbour_levelling: bool = True
    #: Huber threshold of the robust (IRLS) fits, in robust sigmas (1.4826 x MAD); 0 = plain LS.
    huber_threshold: float = Field(default=1.5, ge=0.0)
    #: Longest gap (m) between consecutive readings still joined into one track segment when
    #: searching crossovers; 0 = 5 x the median distance between readings (common practice).
    max_segment_m: float = Field(default=0.0, ge=0.0)
    #: Micro-levelling of the grid (directional filter, Minty 1991), applied by the grid stage.
    micro_levelling: bool = False
    #: Across-line cut-off wavelength of the micro-levelling high-pass, in line spacings (2-4).
    micro_cutoff_spacings: float = Field(default=3.0, gt=0.0)
    #: Largest micro-levelling correction (field units, nT or mGal); larger values are clipped.
    micro_max_amplitude: float = Field(default=2.0, gt=0.0)
    #: Along-line cut-off wavelength of the micro-levelling low-pass, in line spacings.
    micro_along_spacings: float = Field(default=20.0, gt=0.0)


class GridSection(Section):
    #: Cell size (m); 0 = a quarter of the nominal line spacing (common practice).
    spacing_m: float = Field(0.0, ge=0)
    #: Block size for the block reduction (m); 0 = the cell size.
    block_m: float = Field(0.0, ge=0)
    #: Height of the grid (m, ellipsoidal); None = median reading height. "drape" follows data.
    height: float | str | None = None
    #: Trial source depths (multiples of the block size) and dampings, chosen by blocked
    #: cross-validation (old names depth_factors, dampings are accepted with a warning).
    trial_depths: list[float] = Field(default_factory=lambda: [2.5, 4.5, 8.0], min_length=1)
    trial_dampings: list[float] = Field(
        default_factory=lambda: [1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 1e-1], min_length=1
    )
    #: Number of folds of the blocked K-fold cross-validation.
    cv_folds: int = Field(4, ge=2, le=50)
    #: Cells farther than this from data are masked (m); 0 = 2 x line spacing.
    mask_distance_m: float = Field(0.0, ge=0)
    #: Equivalent-source solver: "auto" (dense up to 4000 sources, else FFT lattice), "dense"
    #: (sources beneath the blocks) or "fft" (lattice layer, conjugate gradients).
    method: Literal["auto", "dense", "fft"] = "auto"
    #: Source layer: "follow_drape" (every source the chosen depth below the readings around it,
    #: so the layer follows a draped survey; Cordell 1992) or "flat" (one horizontal plane).
    #: The old key depth_type = "relative"|"constant" is accepted with a warning.
    source_layer: Literal["follow_drape", "flat"] = "follow_drape"
    #: Stopping tolerance of the lattice solver in the final fit (relative norm of the
    #: preconditioned normal-equation residual); the search uses a looser one. On the
    #: 1e6-reading demo 2e-5 scored as 1e-5 on held-out blocks (R2 0.9999862 vs 0.9999865) in
    #: 172 instead of 208 iterations; 4e-5 lost accuracy (0.9999830).
    tolerance: float = Field(2e-5, gt=0, lt=1)
    #: Tiled gridding of very large surveys (potfield.fields.harmonic.tiles) and the tile size (m).
    tiled: bool = False
    tile_size_m: float = Field(0.0, ge=0)

    @field_validator("height")
    @classmethod
    def _height(cls, value):
        if isinstance(value, str) and value != "drape":
            raise ValueError(f"height '{value}' is not known; give a number (m), \"drape\" or leave it out")
        return value

    @field_validator("trial_depths")
    @classmethod
    def _positive_factors(cls, value: list[float]) -> list[float]:
        if any(v <= 0 for v in value):
            raise ValueError("every depth factor must be > 0 (multiples of the block size)")
        return value

    @field_validator("trial_dampings")
    @classmethod
    def _positive_dampings(cls, value: list[float]) -> list[float]:
        if any(v < 0 for v in value):
            raise ValueError("every damping must be >= 0")
        return value

    @model_validator(mode="before")
    @classmethod
    def _old_names(cls, data):
        return renamed_keys(data, "grid", GRID_ALIASES)


#: Products the derive stage can make (potfield.stages.derive); each grid is named
#: "<main grid>_<product>" (upward_continuation: "<main grid>_upward_<distance>m").
DERIVE_PRODUCTS = (
    "reduced_to_pole",
    "vertical_derivative",
    "second_vertical_derivative",
    "x_derivative",
    "y_derivative",
    "total_horizontal_gradient",
    "analytic_signal",
    "tilt_angle",
    "upward_continuation",
)
#: Old short product names, accepted with a warning.
PRODUCT_ALIASES = {
    "rtp": "reduced_to_pole",
    "dz1": "vertical_derivative",
    "dz2": "second_vertical_derivative",
    "dx": "x_derivative",
    "dy": "y_derivative",
    "thg": "total_horizontal_gradient",
    "tga": "analytic_signal",
    "tilt": "tilt_angle",
    "upward": "upward_continuation",
}


class DeriveSection(Section):
    #: Grids to derive from the main grid: reduced_to_pole (magnetic only), vertical_derivative,
    #: second_vertical_derivative (z down), x_derivative, y_derivative (easting/northing),
    #: total_horizontal_gradient, analytic_signal (total gradient amplitude), tilt_angle (degrees),
    #: upward_continuation (continued up by upward_m). Old short names (rtp, dz1, ...) are
    #: accepted with a warning.
    products: list[str] = Field(default_factory=lambda: list(DERIVE_PRODUCTS))
    #: Upward-continuation distance (m, > 0) of the "upward" product.
    upward_m: float = Field(500.0, gt=0)
    #: FFT padding per side as a fraction of the grid size (>= 0.25; common practice).
    pad_fraction: float = Field(0.5, ge=0.25, le=4.0)
    #: Padding: "reflect" (mirror about the edges) or "edge" (repeat edge values), + cosine taper.
    pad_mode: Literal["reflect", "edge"] = "reflect"
    #: Horizontal derivatives: "central" (central differences) or "fft" (wavenumber domain).
    horizontal_method: Literal["central", "fft"] = "central"
    #: Reduction to pole: "auto" (equivalent-layer "sources" when |I| < rtp_threshold_deg, else
    #: plain), "plain" (Baranov filter), "pseudo" (MacLeod et al. 1993), "filter" (regularised
    #: inverse filter, Hansen and Pawlowski 1989) or "sources" (dipole layer fitted to the grid,
    #: Silva 1986; Li and Oldenburg 2001). The method used is recorded in the manifest.
    rtp: Literal["auto", "plain", "pseudo", "filter", "sources"] = "auto"
    #: |I| (degrees) below which rtp = "auto" uses the equivalent-layer RTP.
    rtp_threshold_deg: float = Field(35.0, ge=0, le=90)
    #: Amplitude inclination of the pseudo-inclination RTP (degrees); None = 30 (or |I| when
    #: steeper).
    pseudo_inclination_deg: float | None = Field(None, ge=-90, le=90)
    #: Noise-to-signal level of rtp = "filter": conj(T) / (|T|^2 + level^2); gain <= 1/(2 level).
    rtp_filter_level: float = Field(0.1, gt=0, le=1)
    #: rtp = "sources": depth of the dipole layer below the grid, in grid cells (2.5-6 common).
    rtp_layer_depth_cells: float = Field(3.0, gt=0, le=20)
    #: rtp = "sources": Tikhonov damping relative to the layer operator's largest singular value.
    rtp_layer_damping: float = Field(1e-2, gt=0, lt=1)
    #: Also continue upward by predicting the grid stage's equivalent-source model (when it has one).
    upward_by_model: bool = True

    @field_validator("products", mode="before")
    @classmethod
    def _old_products(cls, value):
        if not isinstance(value, list):
            return value
        old = [v for v in value if isinstance(v, str) and v in PRODUCT_ALIASES]
        if old:
            warn_renamed("derive.products", ", ".join(old), ", ".join(PRODUCT_ALIASES[v] for v in old))
        return [PRODUCT_ALIASES.get(v, v) if isinstance(v, str) else v for v in value]

    @field_validator("products")
    @classmethod
    def _known_products(cls, value: list[str]) -> list[str]:
        for name in value:
            if name not in DERIVE_PRODUCTS:
                close = difflib.get_close_matches(name, list(PRODUCT_ALIASES), n=1, cutoff=0.6)
                if close:  # a typo of an old short name: suggest the new name it stands for
                    raise ValueError(
                        f"unknown derive product '{name}'; did you mean '{PRODUCT_ALIASES[close[0]]}'?"
                    )
                raise ValueError(_unknown(name, DERIVE_PRODUCTS, "derive product"))
        return value


class SeparateSection(Section):
    #: Regional/residual method(s): "upward" (upward continuation, Jacobsen 1987), "two_layer"
    #: (deep + shallow equivalent sources) or "both"; the readings' regional/residual columns come
    #: from the first one ("upward" for "both").
    method: Literal["upward", "two_layer", "both"] = "both"
    #: Upward-continuation height (m) of the regional field.
    regional_height_m: float = Field(2000.0, gt=0)
    #: Two-layer: depth (m) of the deep layer below the grid surface; None = regional_height_m.
    deep_depth_m: float | None = Field(None, gt=0)
    #: Two-layer: depth (m) of the shallow layer; None = 3 x the spacing of the fitted data.
    shallow_depth_m: float | None = Field(None, gt=0)
    #: Two-layer: wavelength (m) shared equally by the layers (sets the shallow damping);
    #: None = 3 x regional_height_m.
    crossover_wavelength_m: float | None = Field(None, gt=0)
    #: Two-layer: damping of the deep layer, and of the shallow one (None = from the crossover).
    deep_damping: float = Field(1e-3, ge=0)
    shallow_damping: float | None = Field(None, ge=0)
    #: Two-layer: most grid cells used in the joint fit (the grid is decimated to this; the dense
    #: solve costs about N^2 memory).
    two_layer_max_data: int = Field(3000, ge=100, le=20000)
    #: FFT padding per side (fraction of the grid size, >= 0.25) and mode ("edge" or "reflect").
    pad_fraction: float = Field(1.0, ge=0.25, le=4.0)
    pad_mode: Literal["edge", "reflect"] = "edge"
    #: Vector data on a plane: the side ("external" or "internal") given the uniform part.
    uniform_part: Literal["external", "internal"] = "external"
    #: Observatory: spherical-harmonic degree of the internal and external potentials.
    internal_degree: int = Field(1, ge=0, le=10)
    external_degree: int = Field(1, ge=0, le=10)
    #: Observatory: Tikhonov damping of the Gauss-coefficient fit (0 = none; > 0 for sparse networks).
    damping: float = Field(0.0, ge=0)
    #: Observatory: per-station baseline removed from each component before the fit: "median"
    #: (the station's median over the run: its crustal bias and baseline error) or "none". The
    #: coefficients are then variations about the run's median level.
    station_baseline: Literal["median", "none"] = "median"
    #: Observatory: a station whose residual RMS has a modified z-score above this (Iglewicz and
    #: Hoaglin 1993; 3.5) is left out and the fit repeated (0 = never; needs 5+ stations).
    station_outlier_z: float = Field(3.5, ge=0)
    #: Observatory: a delimited table of an hourly geomagnetic index (e.g. a ring-current index)
    #: to compare the degree-1 external coefficient q10 with (correlation and regression slope);
    #: index_column names its value column, index_time_column its time column (ISO 8601, UTC,
    #: the start of each hour).
    index_file: str | None = None
    index_column: str | None = None
    index_time_column: str = "time"


class ReportSection(Section):
    geotiff: bool = False
    title: str | None = None
    dpi: int = Field(110, ge=30, le=1200)


class SurveyConfig(Section):
    """The whole survey.toml."""

    survey: SurveySection
    input: InputSection = Field(default_factory=InputSection)
    lines: LinesSection = Field(default_factory=LinesSection)
    clean: CleanSection = Field(default_factory=CleanSection)
    diurnal: DiurnalSection = Field(default_factory=DiurnalSection)
    drift: DriftSection = Field(default_factory=DriftSection)
    reference: ReferenceSection = Field(default_factory=ReferenceSection)
    level: LevelSection = Field(default_factory=LevelSection)
    grid: GridSection = Field(default_factory=GridSection)
    derive: DeriveSection = Field(default_factory=DeriveSection)
    separate: SeparateSection = Field(default_factory=SeparateSection)
    report: ReportSection = Field(default_factory=ReportSection)

    @model_validator(mode="after")
    def _kind_sections(self):
        """Sections that only one survey kind reads must not be filled for another kind: a
        magnetic config pointed at gravity data (or the reverse) is a mistake, not a no-op."""
        kind = self.survey.kind
        used = []
        if kind != "magnetic":
            if self.diurnal.bases:
                used.append(("diurnal.bases", "magnetic"))
            if self.diurnal.remote_reference:
                used.append(("diurnal.remote_reference", "magnetic"))
        if kind != "gravity":
            if self.drift.bases:
                used.append(("drift.bases", "gravity"))
            if self.drift.calibration_file:
                used.append(("drift.calibration_file", "gravity"))
            if self.reference.dem_file:
                used.append(("reference.dem_file", "gravity"))
        if used:
            key, owner = used[0]
            raise ValueError(
                f"'{key}' is only used by {owner} surveys but survey.kind is "
                f"'{kind}' (fix: correct survey.kind or remove {key})"
            )
        return self

    @property
    def kind(self) -> str:
        return self.survey.kind

    def section_hash(self, *names: str) -> str:
        """SHA-256 of the named sections (always including ``survey`` and ``input``)."""
        payload = {n: getattr(self, n).model_dump(mode="json") for n in ("survey", "input", *names)}
        return hashlib.sha256(json.dumps(payload, sort_keys=True).encode()).hexdigest()

    def full_hash(self) -> str:
        return hashlib.sha256(json.dumps(self.model_dump(mode="json"), sort_keys=True).encode()).hexdigest()


def _check_delimiter(value: str) -> str:
    """``auto``, ``whitespace`` or one character that is not a quote or a line break."""
    if value in ("auto", "whitespace") or (len(value) == 1 and value not in '"\r\n'):
        return value
    shown = "an empty delimiter" if not value else f"delimiter {value!r}"
    raise ValueError(f'{shown} is not usable; use "auto", ",", ";", "\\t" or "whitespace"')


def _check_date(value: str) -> str:
    """A ``YYYY-MM-DD`` date (the message says which form is expected)."""
    import datetime as _dt

    try:
        _dt.date.fromisoformat(value.strip())
    except ValueError:
        raise ValueError(f"'{value}' is not a date; write it as YYYY-MM-DD") from None
    return value


def _check_time(value: str) -> str:
    """An ISO 8601 date and time pandas can represent (1677..2262)."""
    import pandas as pd

    try:
        stamp = pd.Timestamp(value.strip())
    except (ValueError, OverflowError):
        raise ValueError(f"'{value}' is not an ISO 8601 time; write it as YYYY-MM-DDThh:mm:ssZ") from None
    if stamp is pd.NaT:
        raise ValueError(f"'{value}' is not an ISO 8601 time; write it as YYYY-MM-DDThh:mm:ssZ")
    return value


def _unknown(key: str, valid, what: str) -> str:
    close = difflib.get_close_matches(key, list(valid), n=1, cutoff=0.5)
    hint = f"did you mean '{close[0]}'?" if close else f"valid: {', '.join(valid)}"
    return f"unknown {what} '{key}'; {hint}"


def _model_at(model: type[BaseModel], loc: tuple) -> type[BaseModel] | None:
    """The pydantic model class that owns the field at ``loc[:-1]``."""
    current: Any = model
    for part in loc[:-1]:
        if isinstance(part, int):
            continue
        field = getattr(current, "model_fields", {}).get(part)
        if field is None:
            return None
        ann = field.annotation
        # unwrap list[Model] / Model | None
        candidates = [ann, *getattr(ann, "__args__", ())]
        nxt = None
        for cand in candidates:
            for sub in (cand, *getattr(cand, "__args__", ())):
                if isinstance(sub, type) and issubclass(sub, BaseModel):
                    nxt = sub
        if nxt is None:
            return None
        current = nxt
    return current


def _format_validation(err: ValidationError, path: Path) -> str:
    first = err.errors()[0]
    # drop the union-member tags pydantic adds to the location (grid.height.float -> grid.height)
    loc = tuple(
        p
        for p in first["loc"]
        if not (isinstance(p, str) and (p in ("float", "int", "str", "bool", "none") or "[" in p))
    )
    key = ".".join(str(p) for p in loc)
    kind = first["type"]
    if kind == "extra_forbidden":
        owner = _model_at(SurveyConfig, loc)
        valid = list(owner.model_fields) if owner else []
        return f"{path}: {_unknown(str(loc[-1]), valid, 'key')} (in [{'.'.join(str(p) for p in loc[:-1]) or 'top level'}])"
    if kind == "missing":
        return f"{path}: key '{key}' is required (fix: add it to survey.toml)"
    if kind == "value_error":
        msg = str(first.get("ctx", {}).get("error", first["msg"]))
        return f"{path}: key '{key}': {msg}" if key else f"{path}: {msg}"
    expected = first["msg"].replace("Input should be", "expected").replace("input should be", "expected")
    got = first.get("input")
    if kind in _RANGE_ERRORS:
        ctx = first.get("ctx", {})
        bound = " and ".join(f"{_RANGE_ERRORS[k]} {ctx[k]}" for k in ("gt", "ge", "lt", "le") if k in ctx)
        return (
            f"{path}: key '{key}' = {got!r} is out of range; it must be {bound} "
            f"(fix: change it in survey.toml)"
        )
    if kind == "finite_number":
        return (
            f"{path}: key '{key}' = {got!r} is not a finite number (fix: give a finite number in survey.toml)"
        )
    if kind == "string_too_short":
        return f"{path}: key '{key}' must not be empty (fix: give it a value in survey.toml)"
    if kind == "too_short":
        least = first.get("ctx", {}).get("min_length", 1)
        return (
            f"{path}: key '{key}' is too short ({got!r}); it needs at least {least} "
            f"value(s) (fix: give at least {least} in survey.toml)"
        )
    return f"{path}: key '{key}' has the wrong type or value ({got!r}); {expected}"


#: pydantic error types of a numeric bound (Field(gt=, ge=, lt=, le=)).
_RANGE_ERRORS = {
    "greater_than": ">",
    "greater_than_equal": ">=",
    "less_than": "<",
    "less_than_equal": "<=",
    "gt": ">",
    "ge": ">=",
    "lt": "<",
    "le": "<=",
}


def parse_config(data: dict, path: Path | str = "survey.toml") -> SurveyConfig:
    """Validate a survey.toml already parsed into a dict."""
    path = Path(path)
    try:
        return SurveyConfig.model_validate(data)
    except ValidationError as err:
        raise ConfigError(_format_validation(err, path)) from None


def load_config(path: Path | str) -> SurveyConfig:
    """Read and validate survey.toml; every problem is a :class:`ConfigError` of one line."""
    path = Path(path)
    if not path.is_file():
        raise ConfigError(
            f"{path}: no survey.toml here",
            fix="run 'potfield new DIR --kind magnetic|gravity|observatory' or point at a survey folder",
        )
    try:
        raw = path.read_bytes()
    except OSError as err:
        raise ConfigError(
            f"{path}: cannot read the file ({err.strerror or err})", fix="check the file's permissions"
        ) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        # TOML is UTF-8 by definition (TOML 1.0.0, "Spec"): name the byte, do not guess.
        line = raw.count(b"\n", 0, err.start) + 1
        column = err.start - (raw.rfind(b"\n", 0, err.start) + 1) + 1
        raise ConfigError(
            f"{path}: line {line}, column {column} (byte offset {err.start}): byte "
            f"0x{raw[err.start]:02x} is not UTF-8 text; a TOML file must be UTF-8",
            fix="save survey.toml as UTF-8 (or replace the character with plain ASCII)",
        ) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(f"{path}: not valid TOML ({err})", fix="correct the syntax at that line") from None
    return parse_config(data, path)
