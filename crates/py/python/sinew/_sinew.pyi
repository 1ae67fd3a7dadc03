"""Type stubs of the native module (use the wrappers in ``sinew``: they accept any dtype,
nibabel images, spacing and batches, and check arguments first)."""

from typing import Any, Callable, Dict, List, Optional, Tuple

import numpy as np
import numpy.typing as npt

__version__: str
PRESETS: List[str]
PARAMETERS: List[str]
CAUTION: str
DEFAULT_WORKING_SPACING: float
WARN_OVERLAP: float

def register(
    fixed: npt.NDArray[np.float32],
    fixed_affine: npt.NDArray[np.float64],
    moving: npt.NDArray[np.float32],
    moving_affine: npt.NDArray[np.float64],
    fixed_labels: Optional[npt.NDArray[np.uint16]] = None,
    moving_labels: Optional[npt.NDArray[np.uint16]] = None,
    mask: Optional[npt.NDArray[np.uint16]] = None,
    preset: str = "default",
    config_json: Optional[str] = None,
    config_name: str = "config",
    params_json: str = "{}",
    units: str = "voxel",
    working_spacing: float = 2.0,
    initial: str = "auto",
    antialias: bool = True,
    nan: str = "refuse",
    threads: Optional[int] = None,
    progress: Optional[Callable[[int, str, int, int], Any]] = None,
) -> Dict[str, Any]: ...
def warp(
    moving: npt.NDArray[np.float32],
    moving_affine: npt.NDArray[np.float64],
    field: npt.NDArray[np.float32],
    field_affine: npt.NDArray[np.float64],
    units: str = "voxel",
    pad: Optional[float] = None,
    threads: Optional[int] = None,
) -> npt.NDArray[np.float32]: ...
def warp_labels(
    moving: npt.NDArray[np.uint16],
    moving_affine: npt.NDArray[np.float64],
    field: npt.NDArray[np.float32],
    field_affine: npt.NDArray[np.float64],
    units: str = "voxel",
    threads: Optional[int] = None,
) -> npt.NDArray[np.uint16]: ...
def jacobian_determinant(
    field: npt.NDArray[np.float32],
    affine: npt.NDArray[np.float64],
    units: str = "voxel",
    threads: Optional[int] = None,
) -> Tuple[npt.NDArray[np.float32], str]: ...
def mind_ssc(
    image: npt.NDArray[np.float32],
    affine: npt.NDArray[np.float64],
    radius: int = 1,
    dilation: int = 2,
    threads: Optional[int] = None,
) -> npt.NDArray[np.float32]: ...
def score(
    fixed_labels: npt.NDArray[np.uint16],
    fixed_affine: npt.NDArray[np.float64],
    moving_labels: npt.NDArray[np.uint16],
    moving_affine: npt.NDArray[np.float64],
    field: Optional[npt.NDArray[np.float32]] = None,
    warped_labels: Optional[npt.NDArray[np.uint16]] = None,
    units: str = "voxel",
    push: bool = False,
    fixed_landmarks: Optional[npt.NDArray[np.float64]] = None,
    moving_landmarks: Optional[npt.NDArray[np.float64]] = None,
    threads: Optional[int] = None,
) -> str: ...
