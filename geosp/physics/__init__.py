"""Forward models of SP sources: kernels (``_kernels``) and public functions (``forward``)."""

from .forward import fault_patch_sp, patch_sp_local  # noqa: F401
