"""Digitising a datasheet plot: an image of plate curves -> curve points -> a wide-layout CSV.

Engine only (numpy, scipy, Pillow; no Flask, no SQL, no click).  The steps, each a function:

1. :func:`load_image` - PNG or JPEG bytes -> :class:`PlotImage` (ink 0..1);
2. :func:`fit_axes` - the user's marks of known value (:class:`AxisMark`) -> :class:`AxisMap`,
   with each mark's residual in pixels so a bad click shows;
3. :func:`trace_curve` - one click on a curve -> :class:`Trace`, the line followed both ways;
4. :func:`curve_points` - a trace through the axis map -> (va [V], ia [mA]) points;
5. :func:`curves_to_wide_csv` - the curves with their grid voltages -> CSV text that
   :func:`fitter.reader.read_text` reads as it is.

Interface contract (agreed with the web front end, issue 12)::

    class DigitiseInputError(fitter.errors.InputError)   # always carries a field, e.g. "image",
                                                          # "marks[2].value", "seed", "curves[1].grid_v"

    MAX_IMAGE_BYTES = 20_000_000        # refused above, with a clear message
    MAX_PIXELS = 40_000_000

    @dataclass(frozen=True)
    class PlotImage:
        ink: np.ndarray      # float32, shape (height, width): 0 = paper, 1 = darkest ink; coloured
                             # lines count as ink (e.g. 1 - min over RGB after background normalisation)
        width: int
        height: int
        format: str          # "png" or "jpeg"

    def load_image(data: bytes, name: str = "image") -> PlotImage
        # PNG or JPEG from bytes (Pillow, with its decompression-bomb guard set to MAX_PIXELS);
        # anything else, truncated files, too large -> DigitiseInputError(field="image") naming `name`.

    @dataclass(frozen=True)
    class AxisMark:
        px: float            # image pixel column (x to the right), may be fractional
        py: float            # image pixel row (y downwards)
        axis: str            # "va" (plate voltage axis, volts) or "ia" (plate current axis, mA)
        value: float

    @dataclass(frozen=True)
    class AxisMap:
        def to_data(self, px, py) -> tuple[np.ndarray, np.ndarray]     # (va [V], ia [mA])
        def to_pixel(self, va, ia_ma) -> tuple[np.ndarray, np.ndarray] # inverse
        residuals: tuple[float, ...]   # per mark, in pixels, in the order given (how far the mark is
                                       # from where the fitted map puts its value)
        rms_px: float
        worst: int | None              # index of the mark with the largest residual, if it stands out
        def to_dict(self) -> dict      # JSON-ready: coefficients, residuals, rms_px, worst

    def fit_axes(marks: Sequence[AxisMark]) -> AxisMap
        # >= 2 marks per axis (else DigitiseInputError field "marks"); two marks of one axis at the
        # same pixel, non-finite values, equal values -> error naming "marks[i]...".
        # With 2 marks per axis: axis-aligned scale+offset. With >= 3 marks on an axis: that axis's
        # value is an affine function of (px, py), least squares (corrects rotation and skew).

    @dataclass(frozen=True)
    class Trace:
        px: np.ndarray; py: np.ndarray   # ordered by px, one point per followed column (or step)
        stop_left: str; stop_right: str  # why it stopped: "edge", "end of line", "box"
        def to_dict(self) -> dict

    def trace_curve(image: PlotImage, seed: tuple[float, float], *,
                    box: tuple[float, float, float, float] | None = None) -> Trace
        # follow the dark line through `seed` both ways along x; box = (x0, y0, x1, y1) pixel limits
        # of the plot area (default: whole image); crosses grid lines, ticks, labels, other curves.
        # seed not on or near (a few px) a line -> DigitiseInputError(field="seed").

    def curve_points(trace: Trace, axes: AxisMap, *, n: int = 40) -> tuple[np.ndarray, np.ndarray]
        # (va [V], ia [mA]) thinned/resampled to about n points spread along the curve, va increasing.

    def curves_to_wide_csv(curves: Sequence[tuple[float, Sequence[float], Sequence[float]]], *,
                           tube: str, section: str = "", note: str = "") -> str
        # curves: (grid_v, va, ia_ma) per curve; returns text in Platebook's wide layout (see
        # curves/datasheet_medium_mu_wide.csv and fitter/reader.py: `va,ia_ma@vg=...` header, a
        # `# tube:` directive, empty cells where a curve has no point at that va), with comment lines
        # saying it was digitised from a datasheet plot. fitter.reader.read_curves must read it
        # unchanged. Bad curves (fewer than 3 points, duplicate grid voltages, non-finite) ->
        # DigitiseInputError(field="curves[i]...").

Each module's docstring says how its step works.
"""

from .axes import AxisMap, AxisMark, fit_axes
from .curves import curve_points, curves_to_wide_csv
from .image import MAX_IMAGE_BYTES, MAX_PIXELS, DigitiseInputError, PlotImage, load_image
from .trace import Trace, trace_curve

__all__ = [
    "DigitiseInputError",
    "MAX_IMAGE_BYTES",
    "MAX_PIXELS",
    "PlotImage",
    "load_image",
    "AxisMark",
    "AxisMap",
    "fit_axes",
    "Trace",
    "trace_curve",
    "curve_points",
    "curves_to_wide_csv",
]
