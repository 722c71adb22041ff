"""Forward models of SP sources: kernels (``_kernels``, ``_fast``), public functions
(``forward``) and derivatives (``jacobian``)."""

from .forward import (  # noqa: F401
    buried_line_sp,
    line_integral,
    fault_patch_sp,
    inclined_sheet_2d_sp,
    patch_sp_local,
    point_pole_sp,
    pole_pair_sp,
    sources_sp,
    sphere_sp,
    strip_2d_sp,
)
from .jacobian import JACOBIAN_PARAMETERS, patch_sp_gradient, patch_sp_local_jacobian  # noqa: F401
