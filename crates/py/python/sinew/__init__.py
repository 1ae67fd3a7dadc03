"""sinew from Python: deformable registration of 3-D scans, warping, Jacobians, MIND-SSC
descriptors and scoring, on numpy arrays (or nibabel images), computed by sinew's Rust engine.

Research use only; not for diagnosis or treatment. Check every registration visually (a
qualified person) before using it; local regulations and clinical practice govern any
clinical use.

Conventions (the same as the ``sinew`` command line):

- Arrays are indexed ``(i, j, k)`` with shape ``(nx, ny, nz)``, NIfTI's voxel order. World
  coordinates are NIfTI's, in mm; a voxel-to-world matrix is a 4x4 ``affine`` (nibabel's
  ``img.affine``), or ``spacing`` (mm per voxel, origin 0) for plain arrays, else 1 mm.
- A displacement field lives on the FIXED grid and pulls: ``warped(x) = moving(x + u(x))``.
  Fields are ``(nx, ny, nz, 3)`` float32, in voxels along ``(i, j, k)`` (``units="voxel"``,
  the default for arrays) or in mm along the world axes (``units="mm"``, NIfTI's convention).
- Every function releases the GIL while it computes, so threads can run several at once, and
  takes ``threads=`` (worker threads for that call; default all cores).
- Bad input raises ``ValueError`` with the command line's one-line message.

sinew reads no files: use nibabel (``nibabel.load``) and pass the image or its array.
"""

from __future__ import annotations

import json
import os
import warnings
from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, Tuple, Union

import numpy as np

from . import _sinew

__version__: str = _sinew.__version__
#: Names of the built-in parameter presets.
PRESETS: Tuple[str, ...] = tuple(_sinew.PRESETS)
#: Names of every registration parameter (keys of ``config`` and of ``**params``).
PARAMETERS: Tuple[str, ...] = tuple(_sinew.PARAMETERS)
#: The caution every report carries.
CAUTION: str = _sinew.CAUTION
#: Default spacing (mm) of the working grid :func:`register` runs on (``--working-spacing``).
DEFAULT_WORKING_SPACING: float = _sinew.DEFAULT_WORKING_SPACING
#: Below this body overlap after the initial alignment, :func:`register` warns (as the command line).
WARN_OVERLAP: float = _sinew.WARN_OVERLAP

__all__ = [
    "register",
    "Registration",
    "warp",
    "jacobian_determinant",
    "mind_ssc",
    "score",
    "PRESETS",
    "PARAMETERS",
    "CAUTION",
    "DEFAULT_WORKING_SPACING",
    "WARN_OVERLAP",
    "__version__",
]


# ----------------------------------------------------------------------------------------
# Argument handling


def _is_image(x: Any) -> bool:
    """A nibabel-like image: has ``affine`` and ``dataobj``."""
    return hasattr(x, "affine") and hasattr(x, "dataobj")


def _pick(value: Any, index: int, rank: int) -> Any:
    """``value`` itself, or its ``index``-th entry when it is a pair (one per scan)."""
    if value is None:
        return None
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == rank + 1 and arr.shape[0] == 2:
        return arr[index]
    return arr


def _affine_of(what: str, spacing: Any, affine: Any) -> np.ndarray:
    """The 4x4 voxel-to-world matrix from ``affine`` or ``spacing`` (else 1 mm)."""
    if affine is not None and spacing is not None:
        raise ValueError(f"{what}: give spacing or affine, not both")
    if affine is not None:
        a = np.asarray(affine, dtype=np.float64)
        if a.shape != (4, 4):
            raise ValueError(f"{what}: the affine must be a 4x4 matrix, got shape {a.shape}")
        if not np.all(np.isfinite(a)):
            raise ValueError(f"{what}: the affine holds NaN or infinite values")
        return np.ascontiguousarray(a)
    s = np.ones(3) if spacing is None else np.asarray(spacing, dtype=np.float64)
    if s.ndim == 0:
        s = np.repeat(s, 3)
    if s.shape != (3,) or not np.all(np.isfinite(s)) or np.any(s <= 0):
        raise ValueError(f"{what}: spacing must be one positive number or three (mm per voxel), got {spacing!r}")
    return np.diag([s[0], s[1], s[2], 1.0])


def _volume(x: Any, what: str, spacing: Any, affine: Any) -> Tuple[np.ndarray, np.ndarray]:
    """The array of ``x`` (a numpy array or a nibabel image) and its 4x4 affine."""
    if x is None:
        raise ValueError(f"{what}: an array or image is required, got None")
    if _is_image(x):
        if affine is not None or spacing is not None:
            raise ValueError(f"{what}: a nibabel image carries its own affine; do not give spacing or affine too")
        data = np.asanyarray(x.dataobj)
        aff = np.asarray(x.affine, dtype=np.float64)
        if aff.shape != (4, 4) or not np.all(np.isfinite(aff)):
            raise ValueError(f"{what}: the image's affine is not a finite 4x4 matrix")
    else:
        try:
            data = np.asarray(x)
        except Exception as e:  # e.g. ragged nested lists
            raise ValueError(f"{what}: not an array ({e})") from None
        aff = _affine_of(what, spacing, affine)
    while data.ndim > 3 and data.shape[-1] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise ValueError(f"{what}: expected a 3-D array (nx, ny, nz), got shape {data.shape}")
    if 0 in data.shape:
        raise ValueError(f"{what}: empty shape {data.shape}: every extent must be at least 1")
    return data, aff


def _scan(x: Any, what: str, spacing: Any, affine: Any) -> Tuple[np.ndarray, np.ndarray]:
    data, aff = _volume(x, what, spacing, affine)
    if data.dtype.kind not in "biuf":
        raise ValueError(f"{what}: expected real numbers, got dtype {data.dtype}")
    return data.astype(np.float32, copy=False), aff


def _labels(x: Any, what: str, spacing: Any, affine: Any) -> Tuple[np.ndarray, np.ndarray]:
    """A label map as uint16 with the command line's checks (integers in 0..=65535)."""
    data, aff = _volume(x, what, spacing, affine)
    kind = data.dtype.kind
    if kind == "b":
        return data.astype(np.uint16), aff
    if kind not in "iuf":
        raise ValueError(f"{what}: expected integer labels, got dtype {data.dtype}")
    if kind == "f":
        bad = ~np.isfinite(data) | (np.floor(data) != data)
        if bad.any():
            v = data[bad].flat[0]
            raise ValueError(f"{what}: labels are not integers (found value {v})")
    if data.size:
        lo, hi = data.min(), data.max()
        if lo < 0:
            raise ValueError(f"{what}: negative label {lo}")
        if hi > 65535:
            raise ValueError(f"{what}: label {hi} exceeds 65535")
    return data.astype(np.uint16, copy=False), aff


def _mask(x: Any, what: str, spacing: Any, affine: Any) -> Tuple[np.ndarray, np.ndarray]:
    data, aff = _volume(x, what, spacing, affine)
    if data.dtype.kind not in "biuf":
        raise ValueError(f"{what}: expected a boolean or numeric mask, got dtype {data.dtype}")
    return (data != 0).astype(np.uint16), aff


def _units(units: Optional[str], field: Any) -> str:
    if units is None:
        # The NIfTI convention for images (sinew writes mm by default); voxels for arrays.
        return "mm" if _is_image(field) else "voxel"
    if units not in ("voxel", "mm"):
        raise ValueError(f'units must be "voxel" or "mm", got {units!r}')
    return units


def _field(x: Any, layout: str, batch: bool = False) -> np.ndarray:
    """A field as float32 channel-last ``(..., nx, ny, nz, 3)`` (a view when possible)."""
    if _is_image(x):
        data = np.asanyarray(x.dataobj)
        if data.ndim == 5 and data.shape[3] == 1:  # NIfTI vector fields: (nx, ny, nz, 1, 3)
            data = data[:, :, :, 0, :]
    else:
        data = np.asarray(x)
    if data.dtype.kind not in "iuf":
        raise ValueError(f"field: expected real numbers, got dtype {data.dtype}")
    rank = 5 if batch else 4
    if data.ndim != rank:
        want = "(batch, nx, ny, nz, 3)" if batch else "(nx, ny, nz, 3)"
        raise ValueError(f"field: expected shape {want} (channel-last) or with the 3 first, got {data.shape}")
    if layout == "channel-first":
        data = np.moveaxis(data, rank - 4, -1)
    elif layout != "channel-last":
        raise ValueError(f'layout must be "channel-last" or "channel-first", got {layout!r}')
    if data.shape[-1] != 3:
        raise ValueError(f"field: the vector axis has {data.shape[-1]} entries, expected 3 (layout {layout!r})")
    return data.astype(np.float32, copy=False)


def _json_default(o: Any) -> Any:
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, (tuple, set)):
        return list(o)
    raise TypeError(f"{type(o).__name__} is not a parameter value")


def _to_json(value: Any, what: str) -> str:
    try:
        return json.dumps(value, default=_json_default, allow_nan=False)
    except (TypeError, ValueError) as e:
        raise ValueError(f"{what}: {e}") from None


def _config(config: Any) -> Tuple[Optional[str], str]:
    """The parameter table as JSON text and its name for messages."""
    if config is None:
        return None, "config"
    if isinstance(config, Mapping):
        return _to_json(dict(config), "config"), "config"
    if isinstance(config, (str, os.PathLike)):
        path = os.fspath(config)
        try:
            with open(path, "rb") as f:
                raw = f.read()
        except OSError:
            raise ValueError(f"{path}: cannot read") from None
        try:
            import tomllib  # Python 3.11+
        except ImportError:  # pragma: no cover - older Pythons
            raise ValueError(f"{path}: reading TOML needs Python 3.11 or later; pass a dict instead") from None
        try:
            table = tomllib.loads(raw.decode("utf-8"))
        except (UnicodeDecodeError, tomllib.TOMLDecodeError) as e:
            raise ValueError(f"{path}: not valid TOML ({e})") from None
        return _to_json(table, path), path
    raise ValueError(f"config: expected a dict or the path of a TOML file, got {type(config).__name__}")


# ----------------------------------------------------------------------------------------
# Registration


class Registration:
    """The result of :func:`register`.

    Attributes:
        field: ``(nx, ny, nz, 3)`` float32 displacement on the fixed scan's own (native) grid,
            pull convention ``warped(x) = moving(x + u(x))``, in :attr:`units`; it includes
            the linear part of the map (initial alignment and rigid/affine stage), so
            ``x + u(x)`` may lie outside the fixed grid when the scans' world frames differ.
        units: ``"voxel"`` (along the array axes i, j, k) or ``"mm"`` (along the world axes).
        warped: the moving scan warped onto the fixed grid, ``(nx, ny, nz)`` float32
            (trilinear; outside the moving scan: its minimum).
        warped_labels: the moving labels warped onto the fixed grid, uint16 (nearest
            neighbour), or ``None`` without ``moving_labels``.
        jacobian_determinant: ``det(I + ∇u)`` per voxel, ``(nx, ny, nz)`` float32.
        jacobian: the determinant's statistics: ``folding_fraction`` (share of voxels with
            det ≤ 0), ``sd_log_j`` (population standard deviation of ln det over det > 0),
            ``min``, ``max``, ``mean``, counts.
        dice: Dice per label before and after (with both label maps), else ``None``.
        affine: the fixed grid's voxel-to-world matrix (4x4, mm).
        report: everything above that is not an array, as ``sinew register``'s report.json
            (parameters, scan options, ``working_grid``, ``initial_alignment``,
            ``linear_map``, timings, per-level reports) less the file names and the QC sheet.
        linear_map: the linear part of the map (4x4 world mm, fixed point ↦ moving point:
            initial alignment then rigid/affine stage; the identity when neither ran).
    """

    __slots__ = (
        "field",
        "units",
        "warped",
        "warped_labels",
        "jacobian_determinant",
        "jacobian",
        "dice",
        "affine",
        "report",
        "linear_map",
    )

    def __init__(self, native: Dict[str, Any], units: str, affine: np.ndarray) -> None:
        self.field: np.ndarray = native["field"]
        self.units: str = units
        self.warped: np.ndarray = native["warped"]
        self.warped_labels: Optional[np.ndarray] = native["warped_labels"]
        self.jacobian_determinant: np.ndarray = native["jacobian_determinant"]
        self.report: Dict[str, Any] = json.loads(native["report_json"])
        self.jacobian: Dict[str, Any] = self.report["jacobian"]
        self.dice: Optional[Dict[str, Any]] = self.report["dice"]
        self.affine: np.ndarray = affine
        self.linear_map: np.ndarray = np.array(self.report["linear_map"], dtype=np.float64)

    def __repr__(self) -> str:
        j = self.jacobian
        s = (
            f"<sinew.Registration field {self.field.shape} {self.units}, "
            f"folding {100 * j['folding_fraction']:.4f} %, SDlogJ {j['sd_log_j']:.3f}"
        )
        if self.dice:
            s += f", mean Dice {self.dice['mean_before']:.3f} -> {self.dice['mean_after']:.3f}"
        return s + ">"


ProgressCallback = Callable[[int, str, int, int], Any]


def register(
    fixed: Any,
    moving: Any,
    *,
    spacing: Any = None,
    affine: Any = None,
    fixed_labels: Any = None,
    moving_labels: Any = None,
    mask: Any = None,
    preset: str = "default",
    config: Union[None, Mapping[str, Any], str, "os.PathLike[str]"] = None,
    units: str = "voxel",
    working_spacing: float = DEFAULT_WORKING_SPACING,
    initial: str = "auto",
    antialias: bool = True,
    nan: Union[str, float] = "refuse",
    threads: Optional[int] = None,
    progress: Optional[ProgressCallback] = None,
    **params: Any,
) -> Registration:
    """Registers ``moving`` to ``fixed``: the same computation as ``sinew register``.

    Each scan is taken on its own grid and in its own world frame. Both are brought to a
    working grid of about ``working_spacing`` mm; the moving scan is aligned to the fixed
    one (``initial``, then the rigid/affine stage) before anything is cut to the fixed field
    of view; the deformable stage runs on the fixed working grid; the field, warped scan and
    labels are returned on the fixed scan's own grid. A ``UserWarning`` is issued when the
    bodies still overlap little after the alignment (as the command line's warning).

    Args:
        fixed: the fixed scan: a 3-D array or a nibabel image. The field lives on its grid.
        moving: the moving scan, on any grid and in any world frame.
        spacing: mm per voxel of array inputs (one number or three; or a pair ``(fixed,
            moving)``); origin 0. Default 1 mm.
        affine: 4x4 voxel-to-world matrix of array inputs (or a pair ``(fixed, moving)``),
            instead of ``spacing``. nibabel images carry their own.
        fixed_labels: label map on the fixed grid (integers 0..65535): Dice before/after.
        moving_labels: label map on the moving grid: warped into ``warped_labels``.
        mask: mask on the fixed grid (non-zero = inside): only voxels inside drive the data term.
        preset: ``"fast"``, ``"default"`` or ``"accurate"``.
        config: a dict of parameters, or the path of a TOML parameter file (``sinew register
            --config``), applied over the preset.
        units: units of the returned field: ``"voxel"`` or ``"mm"``.
        working_spacing: spacing (mm) of the working grid, as ``--working-spacing``: axes
            finer than 0.8 times this are resampled to it, thicker ones (thick slices) are
            kept; ``0`` registers on the fixed scan's own grid.
        initial: initial alignment of scans in different world frames, from their body
            masks, as ``--initial``: ``"auto"`` (when the bodies overlap little or their
            centres lie far apart), ``"centres"``, ``"axes"`` (centres and principal axes)
            or ``"off"``.
        antialias: smooth a scan before bringing it to a coarser working grid
            (``False`` = ``--no-antialias``).
        nan: what to do with NaN or infinite voxels (voxels outside the scanned volume), as
            ``--nan``: ``"refuse"`` (default: a ``ValueError``), ``"pad"`` (replaced by the
            scan's finite minimum; in the fixed scan also left out of the data term) or a
            finite number (replaced by it). The choice and the counts are in the report's
            ``nan`` entry.
        threads: worker threads (default: all cores), as ``-j`` on the command line.
        progress: called as ``progress(level, stage, iteration, iterations)`` while the work
            runs (``stage`` is "pyramid", "descriptors", "optimise" or "jacobian"; level 0 is
            the finest). An exception it raises is re-raised when the registration ends.
        **params: any parameter (see :data:`PARAMETERS`), applied over ``config``, e.g.
            ``lambda_=0.2`` (``lambda`` is a Python keyword), ``iterations=[60, 40, 20, 20]``,
            ``levels=3``, ``diffeomorphic=True``, ``model="bspline"``, ``grid_spacing=15``,
            ``similarity="lncc"``, ``prealign="rigid"`` (the linear stage, ``--affine`` on
            the command line). Changing ``levels`` resizes the per-level lists as the
            command line does.

    Returns:
        A :class:`Registration`.

    Raises:
        ValueError: bad input (the command line's one-line message).
    """
    f_data, f_aff = _scan(fixed, "fixed", _pick(spacing, 0, 1), _pick(affine, 0, 2))
    m_data, m_aff = _scan(moving, "moving", _pick(spacing, 1, 1), _pick(affine, 1, 2))

    def on_scan(conv: Callable, x: Any, what: str, scan: str, data: np.ndarray, aff: np.ndarray) -> Optional[np.ndarray]:
        # Labels and masks lie on their scan's grid; an image's own affine must agree with
        # the scan's within 1e-3 mm (entry-wise), as on the command line.
        if x is None:
            return None
        if _is_image(x):
            arr, l_aff = conv(x, what, None, None)
            if arr.shape == data.shape and not np.all(np.abs(l_aff[:3] - aff[:3]) <= 1e-3):
                raise ValueError(
                    f"{what}: grid {list(arr.shape)} does not match its scan {scan} ({list(data.shape)}); "
                    "resample it onto the scan's grid first"
                )
            return arr
        return conv(x, what, None, None)[0]

    fl = on_scan(_labels, fixed_labels, "fixed_labels", "fixed", f_data, f_aff)
    ml = on_scan(_labels, moving_labels, "moving_labels", "moving", m_data, m_aff)
    mk = on_scan(_mask, mask, "mask", "fixed", f_data, f_aff)
    if units not in ("voxel", "mm"):
        raise ValueError(f'units must be "voxel" or "mm", got {units!r}')
    if preset not in PRESETS:
        raise ValueError(f"unknown preset {preset!r} (choose one of {', '.join(PRESETS)})")
    config_json, config_name = _config(config)
    params_json = _to_json(params, "params")
    if progress is not None and not callable(progress):
        raise ValueError("progress: must be callable as progress(level, stage, iteration, iterations)")
    if isinstance(working_spacing, bool) or not isinstance(working_spacing, (int, float, np.integer, np.floating)):
        raise ValueError(f"working_spacing: must be a number of mm, got {working_spacing!r}")
    if not isinstance(antialias, (bool, np.bool_)):
        raise ValueError(f"antialias: must be True or False, got {antialias!r}")
    if isinstance(nan, bool) or not isinstance(nan, (str, int, float, np.integer, np.floating)):
        raise ValueError(f'nan: expected "refuse", "pad" or a finite number, got {nan!r}')
    native = _sinew.register(
        f_data,
        f_aff,
        m_data,
        m_aff,
        fixed_labels=fl,
        moving_labels=ml,
        mask=mk,
        preset=preset,
        config_json=config_json,
        config_name=config_name,
        params_json=params_json,
        units=units,
        working_spacing=float(working_spacing),
        initial=str(initial),
        nan=nan if isinstance(nan, str) else repr(float(nan)),
        antialias=bool(antialias),
        threads=_threads(threads),
        progress=progress,
    )
    reg = Registration(native, units, f_aff)
    overlap = reg.report["initial_alignment"].get("overlap_final")
    if overlap is not None and overlap < WARN_OVERLAP:
        warnings.warn(
            f"fixed and moving: the bodies overlap only {100 * overlap:.0f} % after the initial alignment; "
            "check that both scans show the same part of the body",
            UserWarning,
            stacklevel=2,
        )
    return reg


def _threads(threads: Optional[int]) -> Optional[int]:
    if threads is None:
        return None
    if isinstance(threads, bool) or not isinstance(threads, (int, np.integer)) or threads < 1:
        raise ValueError(f"threads must be at least 1, got {threads!r}")
    return int(threads)


# ----------------------------------------------------------------------------------------
# Field tools


def warp(
    moving: Any,
    field: Any,
    *,
    spacing: Any = None,
    affine: Any = None,
    units: Optional[str] = None,
    layout: str = "channel-last",
    labels: bool = False,
    pad: Optional[float] = None,
    threads: Optional[int] = None,
) -> np.ndarray:
    """Warps a scan (or with ``labels=True`` a label map) through a pull field:
    ``warped(x) = moving(x + u(x))``, as ``sinew warp``.

    Args:
        moving: the moving scan or label map (array or nibabel image).
        field: ``(nx, ny, nz, 3)`` (or ``(3, nx, ny, nz)`` with ``layout="channel-first"``)
            on the fixed grid, or a nibabel field image. The result is on its grid.
        spacing, affine: the grids of array inputs: one value for both, or a pair
            ``(field, moving)``.
        units: ``"voxel"`` or ``"mm"``; default voxel for arrays, mm for a nibabel field.
        labels: nearest neighbour for a label map (label 0 outside) instead of trilinear.
        pad: value outside the moving scan (default its minimum; scans only).
        threads: worker threads.

    Returns:
        ``(nx, ny, nz)`` float32 (scans) or uint16 (labels) on the field's grid.
    """
    u = _units(units, field)
    f_aff = np.asarray(field.affine, dtype=np.float64) if _is_image(field) else _affine_of("field", _pick(spacing, 0, 1), _pick(affine, 0, 2))
    fdata = _field(field, layout)
    if labels:
        m, m_aff = _labels(moving, "moving", _pick(spacing, 1, 1), _pick(affine, 1, 2))
        return _sinew.warp_labels(m, m_aff, fdata, f_aff, units=u, threads=_threads(threads))
    m, m_aff = _scan(moving, "moving", _pick(spacing, 1, 1), _pick(affine, 1, 2))
    if pad is not None:
        try:
            pad = float(pad)
        except (TypeError, ValueError):
            raise ValueError(f"pad: must be a number, got {pad!r}") from None
    return _sinew.warp(m, m_aff, fdata, f_aff, units=u, pad=pad, threads=_threads(threads))


def jacobian_determinant(
    field: Any,
    *,
    spacing: Any = None,
    affine: Any = None,
    units: Optional[str] = None,
    layout: str = "channel-last",
    stats: bool = False,
    threads: Optional[int] = None,
) -> Union[np.ndarray, Tuple[np.ndarray, Dict[str, Any]]]:
    """Jacobian determinant of the map ``x ↦ x + u(x)``: central differences in the interior,
    one-sided at the border (as the command line).

    Args:
        field: ``(nx, ny, nz, 3)`` (or channel-first) field, or a nibabel field image.
        spacing, affine: its grid (needed to convert mm vectors; the determinant of a voxel
            field does not depend on it).
        units: ``"voxel"`` or ``"mm"``; default voxel for arrays, mm for a nibabel field.
        layout: ``"channel-last"`` or ``"channel-first"``.
        stats: also return the statistics (folding, SDlogJ, min, max, mean).
        threads: worker threads.

    Returns:
        ``(nx, ny, nz)`` float32, or ``(det, stats)`` with ``stats=True``.
    """
    u = _units(units, field)
    aff = np.asarray(field.affine, dtype=np.float64) if _is_image(field) else _affine_of("field", spacing, affine)
    det, js = _sinew.jacobian_determinant(_field(field, layout), aff, units=u, threads=_threads(threads))
    return (det, json.loads(js)) if stats else det


def mind_ssc(
    image: Any,
    *,
    radius: int = 1,
    dilation: int = 2,
    spacing: Any = None,
    affine: Any = None,
    threads: Optional[int] = None,
) -> np.ndarray:
    """MIND-SSC descriptors ("MIND: Modality independent neighbourhood descriptor for
    multi-modal deformable registration", Medical Image Analysis 2012; self-similarity
    context variant, MICCAI 2013), as the registration computes them.

    Args:
        image: a 3-D scan (array or nibabel image).
        radius: patch radius r in voxels (patches of (2r+1)³ voxels).
        dilation: distance d in voxels of the six neighbours.
        spacing, affine: its grid (recorded only; the descriptor works in voxels).
        threads: worker threads.

    Returns:
        ``(nx, ny, nz, 12)`` float32, channel-last.
    """
    data, aff = _scan(image, "image", spacing, affine)
    for name, v in (("radius", radius), ("dilation", dilation)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 0:
            raise ValueError(f"mind_ssc: {name} must be a non-negative integer, got {v!r}")
    return _sinew.mind_ssc(data, aff, int(radius), int(dilation), threads=_threads(threads))


# ----------------------------------------------------------------------------------------
# Scoring


def score(
    fixed_labels: Any,
    moving_labels: Any,
    field: Any = None,
    *,
    warped_labels: Any = None,
    spacing: Any = None,
    affine: Any = None,
    units: Optional[str] = None,
    layout: str = "channel-last",
    direction: str = "pull",
    fixed_landmarks: Any = None,
    moving_landmarks: Any = None,
    threads: Optional[int] = None,
) -> Union[Dict[str, Any], List[Dict[str, Any]]]:
    """Scores a registration as ``sinew score`` does.

    Figures: Dice per non-zero label of the fixed map, before (moving labels resampled onto
    the fixed grid, identity) and after; HD95 = 95th percentile (numpy's linear rule) of the
    pooled symmetric distances in mm between the 6-connected label surfaces, HD and ASSD;
    with a field its Jacobian statistics (folding = share of voxels with det J ≤ 0; SDlogJ =
    population standard deviation of ln det J over det J > 0) and with landmarks
    ``|x + u(x) − y|`` in mm.

    Args:
        fixed_labels: label map on the fixed grid, or a batch ``(batch, nx, ny, nz)``.
        moving_labels: label map of the moving scan (its own grid), or a batch.
        field: pull field ``(nx, ny, nz, 3)`` on the fixed grid, or a batch
            ``(batch, nx, ny, nz, 3)``; ``layout="channel-first"`` for ``(3, nx, ny, nz)``
            and ``(batch, 3, nx, ny, nz)``.
        warped_labels: instead of a field, moving labels already on the fixed grid (or a batch).
        spacing, affine: grids of array inputs: one for both, or a pair ``(fixed, moving)``.
        units: of the field: ``"voxel"`` (default for arrays) or ``"mm"``.
        direction: ``"pull"`` (sinew's) or ``"push"`` (moving → fixed; inverted first by 20
            fixed-point iterations, residual reported under ``"inverted"``).
        fixed_landmarks, moving_landmarks: ``(n, 3)`` world mm, in corresponding order.
        threads: worker threads.

    Returns:
        A dict (``labels``: per label ``dice_before``, ``dice``, ``surface`` with
        ``hd95_mm``, ``hd_mm``, ``assd_mm``; ``mean_dice_before``, ``mean_dice``,
        ``mean_hd95_mm``, ``jacobian``, ``landmarks``, ``inverted``), or a list of them for a batch.
    """
    if (field is None) == (warped_labels is None):
        raise ValueError("give a field or warped_labels (exactly one)")
    if direction not in ("pull", "push"):
        raise ValueError(f'direction must be "pull" or "push", got {direction!r}')
    u = _units(units, field) if field is not None else "voxel"
    f_sp, m_sp = _pick(spacing, 0, 1), _pick(spacing, 1, 1)
    f_af, m_af = _pick(affine, 0, 2), _pick(affine, 1, 2)

    def batchable(x: Any) -> Tuple[Any, bool]:
        if x is None or _is_image(x):
            return x, False
        a = np.asarray(x)
        return a, a.ndim == 4

    fixed_b, fixed_is_batch = batchable(fixed_labels)
    moving_b, moving_is_batch = batchable(moving_labels)
    if field is not None:
        fd = np.asanyarray(field.dataobj) if _is_image(field) else np.asarray(field)
        is_batch = fd.ndim == 5 and not (_is_image(field) and fd.shape[3] == 1)
    else:
        wl = np.asarray(warped_labels) if not _is_image(warped_labels) else None
        is_batch = wl is not None and wl.ndim == 4
    n = None
    for name, flag, arr in (("fixed_labels", fixed_is_batch, fixed_b), ("moving_labels", moving_is_batch, moving_b)):
        if flag:
            if not is_batch:
                raise ValueError(f"{name}: a batch of label maps needs a batch of fields (or warped_labels)")
            n = arr.shape[0] if n is None else n
    lm = None
    if (fixed_landmarks is None) != (moving_landmarks is None):
        raise ValueError("landmarks: give both fixed_landmarks and moving_landmarks")
    if fixed_landmarks is not None:
        lm = tuple(np.ascontiguousarray(np.asarray(p, dtype=np.float64)) for p in (fixed_landmarks, moving_landmarks))

    def one(fx: Any, mv: Any, fld: Any, wl: Any) -> Dict[str, Any]:
        f_arr, f_aff = _labels(fx, "fixed_labels", f_sp, f_af)
        m_arr, m_aff = _labels(mv, "moving_labels", m_sp, m_af)
        kw: Dict[str, Any] = {}
        if fld is not None:
            kw["field"] = fld
        else:
            kw["warped_labels"] = _labels(wl, "warped_labels", f_sp, f_af)[0]
        r = json.loads(
            _sinew.score(
                f_arr,
                f_aff,
                m_arr,
                m_aff,
                units=u,
                push=direction == "push",
                fixed_landmarks=None if lm is None else lm[0],
                moving_landmarks=None if lm is None else lm[1],
                threads=_threads(threads),
                **kw,
            )
        )
        out = dict(r["score"])
        out["landmarks"] = r["landmarks"]
        out["inverted"] = r["inverted"]
        return out

    if not is_batch:
        fld = _field(field, layout) if field is not None else None
        return one(fixed_labels, moving_labels, fld, warped_labels)
    fields = _field(field, layout, batch=True) if field is not None else None
    count = (fields if fields is not None else wl).shape[0]
    if n is not None and n != count:
        raise ValueError(f"batch sizes differ: {n} label maps, {count} fields")
    results = []
    for b in range(count):
        fx = fixed_b[b] if fixed_is_batch else fixed_labels
        mv = moving_b[b] if moving_is_batch else moving_labels
        results.append(one(fx, mv, fields[b] if fields is not None else None, None if fields is not None else wl[b]))
    return results
