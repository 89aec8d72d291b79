"""Units of the input columns: the factor from each accepted unit to potfield's own unit
(nT, mGal, m), and which quantity each canonical column measures. Shared by the survey.toml
schema (potfield.config) and the readers (potfield.io), which must not import the schema."""

#: Units accepted per physical quantity, with the factor to potfield's internal unit.
UNIT_FACTORS = {
    "magnetic": {"nT": 1.0, "uT": 1000.0, "pT": 0.001, "gamma": 1.0},
    "gravity": {"mGal": 1.0, "um/s^2": 0.1, "gu": 0.1, "m/s^2": 1.0e5, "cu": 1.0},
    "length": {"m": 1.0, "ft": 0.3048, "km": 1000.0},
}
#: Which quantity each canonical column measures (for unit conversion).
COLUMN_QUANTITY = {
    "total_field": "magnetic",
    "mag_north": "magnetic",
    "mag_east": "magnetic",
    "mag_down": "magnetic",
    "reading": "gravity",
    "reading_sd": "gravity",
    "meter_tide": "gravity",
    "height": "length",
    "instrument_height": "length",
    "elevation": "length",
    "easting": "length",
    "northing": "length",
}
