"""LV2 backend: a preset's generated kernels packaged as an LV2 plugin bundle."""
