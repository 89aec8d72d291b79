"""Physics on arrays: reference fields, corrections, continuation, equivalent sources, separation, levelling, noise."""
