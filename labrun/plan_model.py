"""The plan file's model: pydantic tables of a plan TOML (``PlanFile``), unknown keys refused with
their field path, value bounds against typos. Cross-field checks and expansion are
``labrun.plan.Plan``'s."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from labrun.inputfile import FILE_MODEL_CONFIG, Number
from labrun.osa_auto import POINT_STEPS

MAX_VALUES_PER_AXIS = 10_000
MAX_POINTS = 1_000_000
# Where the lines of a plan (tones and every requested sideband) may lie: what silica fibre
# carries and grating OSAs cover (common practice).
LINE_RANGE_NM = (600.0, 2500.0)


# ----------------------------------------------------------------------------- file structure


class _Strict(BaseModel):
    """Base for plan tables: unknown keys are errors (catches typos with their field path)."""

    model_config = ConfigDict(**FILE_MODEL_CONFIG, frozen=True)


class MetaSpec(_Strict):
    """[plan]: what is measured and how many sideband orders matter."""

    name: str = Field(min_length=1)
    spool: str = Field(min_length=1)
    note: str = ""
    orders: int = Field(3, ge=1, le=10)
    amplifier: bool = False
    # read the input-tap power meter once per point when the bench has one (engine; the
    # exact fit takes the launched total from it)
    tap_power: bool = True


class AxisSpec(_Strict):
    """[axes.NAME]: one axis as values, linspace/logspace (num) or start/stop/step."""

    values: list[Any] | None = None
    start: float | None = None
    stop: float | None = None
    step: float | None = None
    num: int | None = Field(None, ge=1, le=MAX_VALUES_PER_AXIS)  # bounded before allocation
    scale: Literal["linear", "log"] = "linear"
    settle_s: float = Field(0.0, ge=0.0, le=3600.0)
    paddle: int | None = Field(None, ge=1, le=3)
    base: Annotated[tuple[Number, Number, Number] | None, Field(strict=False)] = None
    plane: Literal["s1s2", "s1s3", "s2s3"] = "s1s2"


class OrderSpec(_Strict):
    """[order]: nesting (outermost first), zipped groups, snake, repeats, shuffle, references."""

    nesting: list[str] | None = None
    zip: list[list[str]] = []
    snake: bool = False
    repeats: int = Field(1, ge=1, le=1000)
    repeat_mode: Literal["sweep", "point"] = "sweep"
    shuffle_seed: int | None = None
    reference_every: int | None = Field(None, ge=1)
    reference: dict[str, Any] = {}


class OsaSpec(_Strict):
    """[osa]: explicit values override the automatic choice field by field."""

    center_nm: float | None = Field(None, ge=LINE_RANGE_NM[0], le=LINE_RANGE_NM[1])
    span_nm: float | None = Field(None, gt=0, le=LINE_RANGE_NM[1] - LINE_RANGE_NM[0])
    rbw_nm: float | None = Field(None, ge=0.001, le=10.0)  # finer than any grating OSA: refused
    points: int | None = Field(None, ge=3, le=POINT_STEPS[-1])
    margin: float = Field(0.25, ge=0.0, le=10.0)
    min_margin_nm: float = Field(0.5, ge=0.0, le=50.0)
    samples_per_rbw: float = Field(5.0, ge=5.0, le=1000.0)
    skirt_db: float = Field(60.0, gt=0.0, le=200.0)
    sweep_s: float | None = Field(None, ge=0.0, le=3600.0)
    capture_input: bool = False
    input_every: int = Field(1, ge=1, le=MAX_POINTS)


class StopSpec(_Strict):
    """[[stop]]: a condition on the reduced lines that ends the run early."""

    when: Literal["sideband_above", "line_above", "tone_snr_below"]
    dbm: float | None = Field(None, ge=-200.0, le=60.0)  # beyond any OSA's display range
    db: float | None = Field(None, ge=0.0, le=200.0)  # an SNR threshold
    order: int | None = Field(None, ge=1, le=10)
    side: Literal["low", "high", "any"] = "any"
    tone: Literal["a", "b", "any"] = "any"
    consecutive: int = Field(1, ge=1, le=MAX_POINTS)


class SpoolSpec(_Strict):
    """[spool]: what is known of the spool named in [plan] (recorded on its spool row, optional)."""

    length_km: float | None = Field(None, gt=0.0, le=1.0e5)
    loss_db_per_km: float | None = Field(None, ge=0.0, le=100.0)
    fibre_type: str | None = Field(None, min_length=1, max_length=100)
    note: str | None = None
    # A dispersion the lab knows (as `labrun spool set --dispersion`): signed D, its standard
    # uncertainty, the slope (and its u) at dispersion_at_nm. |D| <= 300, |S| <= 5: every
    # fibre (common practice), typos out.
    dispersion_ps_per_nm_km: float | None = Field(None, ge=-300.0, le=300.0)
    dispersion_u_ps_per_nm_km: float | None = Field(None, gt=0.0, le=100.0)
    dispersion_slope_ps_per_nm2_km: float | None = Field(None, ge=-5.0, le=5.0)
    dispersion_slope_u_ps_per_nm2_km: float | None = Field(None, ge=0.0, le=5.0)
    dispersion_at_nm: float | None = Field(None, ge=1000.0, le=2000.0)
    # Standard uncertainties of the length (km, absolute, below the length) and of the loss
    # (dB/km, at most 10: typos out) for the fit's GUM budget, as `labrun spool set
    # --length-u-km / --loss-u-db-per-km`; none: the fit's defaults (0.5 %, 0.02 dB/km).
    length_u_km: float | None = Field(None, gt=0.0, le=1.0e5)
    loss_u_db_per_km: float | None = Field(None, gt=0.0, le=10.0)

    def known(self) -> dict[str, Any]:
        """The fields given in the file (what a new or incomplete spool row takes)."""
        return {k: v for k, v in self.model_dump().items() if v is not None}


class PlanFile(_Strict):
    """The whole plan file."""

    plan: MetaSpec
    spool: SpoolSpec = SpoolSpec()
    fixed: dict[str, Any] = {}
    axes: dict[str, AxisSpec] = {}
    order: OrderSpec = OrderSpec()
    osa: OsaSpec = OsaSpec()
    stop: list[StopSpec] = []
