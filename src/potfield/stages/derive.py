"""derive stage: continuation and derived products of the main grid.

Glue only: picks the grid stage's main grid (``anomaly`` for magnetics, ``bouguer_anomaly`` for
gravity), its equivalent-source model when there is one (to fill masked cells before the FFT and
to continue upward exactly), and calls :mod:`potfield.fields.harmonic.transforms` for each product in
``[derive] products``. Every product is an output grid masked like the input.
"""

from __future__ import annotations

import warnings

import numpy as np

from ..errors import CRSError, InputDataError, StageError
from ..fields.errors import FieldError, NotEnoughData
from ..fields.harmonic import transforms as tf
from ._boundary import Rule, translate
from .base import ANOMALY_COLUMN, Contract, Stage, StageContext, StageOutput, main_grid_names
from .gridmodel import grid_height, load_grid_model

#: How masked cells were filled (potfield.fields.harmonic.transforms.fill_masked "fill" attribute).
FILL_TEXT = {
    "none": "none",
    "smooth fill": "smooth fill",
    "filler": "equivalent-source prediction",
    "filler + smooth fill": "equivalent-source prediction + smooth fill",
}
#: [derive] products (potfield.config.DERIVE_PRODUCTS) -> the short codes used below.
PRODUCT_CODES = {
    "reduced_to_pole": "rtp",
    "vertical_derivative": "dz1",
    "second_vertical_derivative": "dz2",
    "x_derivative": "dx",
    "y_derivative": "dy",
    "total_horizontal_gradient": "thg",
    "analytic_signal": "tga",
    "tilt_angle": "tilt",
    "upward_continuation": "upward",
}


PRODUCT_NAMES = {v: k for k, v in PRODUCT_CODES.items()}


def grid_suffix(code: str, upward_m: float) -> str:
    """Descriptive grid-name suffix of a product code (e.g. "upward" -> "upward_500m")."""
    names = {v: k for k, v in PRODUCT_CODES.items()}
    if code == "upward":
        return f"upward_{upward_m:g}m"
    if code == "upward_model":
        return f"upward_{upward_m:g}m_by_model"
    return names[code]


def _main_grid(ctx: StageContext):
    order = main_grid_names(ctx.config.kind)
    for name in order:
        if name in ctx.grids:
            return name, ctx.grids[name]
    raise StageError(
        f"no '{order[0]}' grid from the grid stage (grids present: {', '.join(ctx.grids) or 'none'})",
        fix="run the grid stage first, e.g. 'potfield run SURVEY --from grid'",
    )


def run(ctx: StageContext) -> StageOutput:
    """Derive the products of ``[derive] products`` from the grid stage's main grid.

    Parameters
    ----------
    ctx : StageContext
        Needs ``ctx.grids["anomaly"]`` (magnetic) or ``["bouguer_anomaly"]`` (gravity); for
        ``rtp`` also ``ctx.state["reference"]["inclination"/"declination"]`` (degrees, at the
        centroid) and, to turn the declination to grid north, ``ctx.state["ingest"]["crs"]`` and
        ``["centroid"]``; optionally ``ctx.state["grid"]["model_path"]`` (equivalent-source
        model) and the grid height. ``[derive] rtp = "auto"`` uses the Baranov filter at
        ``|I| >= rtp_threshold_deg`` (35) and the equivalent dipole layer below it.

    Returns
    -------
    StageOutput
        One grid per product named ``<main grid>_<product>`` (``_upward_<distance>m``, plus
        ``_upward_<distance>m_by_model`` when the model continued the field), masked like the input; metrics and state say which RTP
        filter was used.

    References
    ----------
    See :mod:`potfield.fields.harmonic.transforms` (Blakely 1995; Baranov 1957; MacLeod, Jones and Dai
    1993; Hansen and Pawlowski 1989; Nabighian 1972; Roest et al. 1992; Miller and Singh 1994;
    Dampney 1969) and :mod:`potfield.fields.harmonic.rtp_layer` (Silva 1986; Li and Oldenburg 2001).
    """
    cfg = ctx.config.derive
    out = StageOutput()
    name, grid = _main_grid(ctx)
    grid = grid.transpose("northing", "easting")
    products = [PRODUCT_CODES.get(p, p) for p in dict.fromkeys(cfg.products)]
    common = dict(pad_fraction=cfg.pad_fraction, pad_mode=cfg.pad_mode)

    model = load_grid_model(
        ctx,
        out,
        missing="masked cells filled by a smooth fill instead (re-run the grid stage to restore it)",
        absent="no equivalent-source model from the grid stage: masked cells filled by a smooth "
        "fill before the FFT",
    )
    height = grid_height(ctx, grid) if model is not None else None
    if model is not None and height is None:
        out.warnings.append(
            "the grid's height is unknown (no 'upward' coordinate or grid-stage "
            "height): the equivalent-source model is not used; smooth fill instead"
        )
        model = None
    valid = np.isfinite(grid.values)
    masked = int((~valid).sum())
    source, fill_text = grid, "none"
    if masked:
        filler = None
        if model is not None:  # the model's prediction on the full grid fills masked cells
            easting, northing = np.meshgrid(grid.easting.values, grid.northing.values)
            upward = np.broadcast_to(np.asarray(height, dtype=float), easting.shape)
            filler = model.predict((easting, northing, upward))
        # fill once for every product; each result is masked again in add()
        source = tf.fill_masked(grid, filler=filler)
        fill_text = FILL_TEXT[source.attrs["fill"]]
        out.notes.append(
            f"{masked} masked cells of '{name}' filled by {fill_text} before the FFT and masked again after"
        )
    out.metrics.update({"input_grid": name, "masked_cells": masked, "fill": fill_text})
    made: dict[str, str] = {}

    def add(product: str, result) -> None:
        key = f"{name}_{grid_suffix(product, cfg.upward_m)}"
        result = result.copy(data=np.where(valid, result.values, np.nan)).rename(key)
        if masked:
            result.attrs["history"] += f"; masked cells filled ({fill_text}) and masked again"
        out.grids[key] = result
        made[PRODUCT_NAMES.get(product, product)] = key

    if "rtp" in products:
        if ctx.config.kind != "magnetic":
            out.notes.append("rtp skipped: reduction to the pole applies to magnetic surveys only")
        else:
            ref = ctx.state.get("reference", {})
            inc, dec = ref.get("inclination"), ref.get("declination")
            if inc is None or dec is None:
                raise StageError(
                    "the reference stage recorded no inclination/declination for the reduction to the pole",
                    key="derive.products",
                    fix="run the reference stage first, or remove 'rtp' from [derive] products",
                )
            ingest = ctx.state.get("ingest", {})
            crs, centroid = ingest.get("crs"), ingest.get("centroid")
            dec_true = float(dec)
            if crs and centroid:  # the filter works on grid axes: declination from grid north
                with translate(
                    CRSError,
                    key="survey.output_crs",
                    fix="check [survey] output_crs and the survey coordinates",
                ):
                    dec, true_north = tf.grid_declination(
                        dec_true, crs, float(centroid[0]), float(centroid[1])
                    )
                out.metrics["rtp_true_north_deg"] = true_north
                out.notes.append(
                    f"declination {dec_true:.2f} deg from true north is {dec:.2f} deg "
                    "from grid north (meridian convergence)"
                )
            else:
                out.notes.append(
                    "no output CRS/centroid from ingest: declination used as if grid north were true north"
                )
            pseudo = cfg.pseudo_inclination_deg
            if pseudo is None:
                pseudo = tf.default_pseudo_inclination(inc)
            method = cfg.rtp
            if method == "auto":
                method = tf.rtp_method_for(float(inc), cfg.rtp_threshold_deg)
            spacing = max(
                abs(float(grid.easting.values[1] - grid.easting.values[0])),
                abs(float(grid.northing.values[1] - grid.northing.values[0])),
            )
            # the layer is fitted to the valid cells only (masked cells are not data)
            rtp = tf.reduction_to_pole(
                grid if method == "sources" else source,
                float(inc),
                float(dec),
                method=method,
                pseudo_inclination=pseudo,
                auto_threshold=cfg.rtp_threshold_deg,
                wiener_level=cfg.rtp_filter_level,
                layer_depth=cfg.rtp_layer_depth_cells * spacing,
                layer_damping=cfg.rtp_layer_damping,
                **common,
            )
            add("rtp", rtp)
            method = rtp.attrs["rtp_method"]
            out.metrics.update(
                {
                    "rtp_method": method,
                    "rtp_inclination_deg": float(inc),
                    "rtp_declination_deg": dec_true,
                    "rtp_grid_declination_deg": float(dec),
                }
            )
            label = {
                "plain": "plain filter (Baranov)",
                "pseudo": "pseudo-inclination filter",
                "filter": "regularised inverse filter",
                "sources": "equivalent dipole layer",
            }
            text = (
                f"reduction to the pole: {label[method]} at I {float(inc):.2f}, D {float(dec):.2f} deg (grid)"
            )
            if cfg.rtp == "auto":
                text += (
                    f'; chosen by rtp = "auto" (|I| {">=" if method == "plain" else "<"} '
                    f"{cfg.rtp_threshold_deg:g} deg)"
                )
            if method == "pseudo":
                out.metrics["rtp_pseudo_inclination_deg"] = rtp.attrs["pseudo_inclination"]
                text += (
                    f", amplitude inclination {rtp.attrs['pseudo_inclination']:.1f} deg (MacLeod et al. 1993)"
                )
            elif method == "filter":
                out.metrics["rtp_filter_level"] = rtp.attrs["wiener_level"]
                text += f", noise-to-signal level {rtp.attrs['wiener_level']:g} (Hansen and Pawlowski 1989)"
            elif method == "sources":
                for key in ("layer_depth", "layer_damping", "layer_iterations", "layer_residual_rms"):
                    out.metrics[f"rtp_{key}"] = rtp.attrs[key]
                text += (
                    f", layer {rtp.attrs['layer_depth']:g} m deep, fit RMS "
                    f"{rtp.attrs['layer_residual_rms']:.3g} {grid.attrs.get('units', '')} "
                    "(Silva 1986; Li and Oldenburg 2001)"
                )
            if method == "plain" and abs(float(inc)) < cfg.rtp_threshold_deg:
                out.warnings.append(
                    f"reduction to the pole with the plain Baranov filter at |I| = {abs(float(inc)):.1f} "
                    f"< {cfg.rtp_threshold_deg:g} deg: expect stripes along the declination; "
                    '[derive] rtp = "sources" is stable there'
                )
            out.notes.append(text)

    for order in (1, 2):
        if f"dz{order}" in products:
            add(f"dz{order}", tf.vertical_derivative(source, order, **common))
    if "dx" in products or "dy" in products:
        dx, dy = tf.horizontal_derivatives(source, cfg.horizontal_method, **common)
        if "dx" in products:
            add("dx", dx)
        if "dy" in products:
            add("dy", dy)
    if "thg" in products:
        add("thg", tf.total_horizontal_gradient(source, cfg.horizontal_method, **common))
    if "tga" in products:
        add("tga", tf.total_gradient_amplitude(source, cfg.horizontal_method, **common))
    if "tilt" in products:
        add("tilt", tf.tilt_angle(source, cfg.horizontal_method, **common))
    if "upward" in products:
        up = tf.upward_continuation(source, cfg.upward_m, **common)
        add("upward", up)
        if model is not None and cfg.upward_by_model:
            exact = tf.model_upward_continuation(model.predict, grid, cfg.upward_m, height)
            add("upward_model", exact)
            diff = (up.values - exact.values)[np.isfinite(exact.values)]
            rms = float(np.sqrt(np.mean(diff**2))) if diff.size else float("nan")
            out.metrics["upward_fft_minus_model_rms"] = rms
            out.notes.append(
                f"upward continuation by {cfg.upward_m:g} m: FFT and equivalent-source "
                f"results differ by {rms:.3g} {grid.attrs.get('units', '')} RMS "
                "(edge effects of the FFT and the model's fit)"
            )
    out.metrics["products"] = len(made)
    out.state = {
        "input_grid": name,
        "products": made,
        "fill": out.metrics["fill"],
        "upward_m": float(cfg.upward_m),
    }
    for key in ("rtp_method", "rtp_pseudo_inclination_deg", "rtp_filter_level", "rtp_layer_depth"):
        if key in out.metrics:
            out.state[key] = out.metrics[key]
    return out


def _run(ctx: StageContext) -> StageOutput:
    """Run with numerical warnings from the transforms collected into the stage's warnings."""
    with (
        warnings.catch_warnings(record=True) as caught,
        translate(
            {
                NotEnoughData: Rule(
                    InputDataError, fix="check the grid stage's output and its mask distance"
                ),
                FieldError: InputDataError,
            }
        ),
    ):
        warnings.simplefilter("always", UserWarning)
        result = run(ctx)
    result.warnings.extend(str(w.message) for w in caught if issubclass(w.category, UserWarning))
    return result


STAGE = Stage(
    name="derive",
    summary="derived grids: reduction to the pole, vertical and horizontal derivatives, total "
    "horizontal gradient, total gradient amplitude, tilt angle and upward continuation",
    run=_run,
    sections=("derive", "grid"),
    kinds=("magnetic", "gravity"),
    contract=Contract(
        requires_state=("grid",),
        reads=(),  # grids and the grid stage's model only
        provides_grids=tuple(f"{name}_*" for name in ANOMALY_COLUMN.values()),
    ),
)
