"""Bundled demo area: an invented geothermal prospect with a planted SP survey (see README.md)."""
