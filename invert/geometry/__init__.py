"""Geometry: the only package that knows the shape of the region (disk, ball)."""

from .ball import Ball, ball_poisson_kernel, poisson_kernel_nd, real_sph_harm
from .disk import RIM_TOLERANCE, Disk, arc_harmonic_measure, poisson_kernel

__all__ = ["Disk", "Ball", "RIM_TOLERANCE", "poisson_kernel", "arc_harmonic_measure",
           "ball_poisson_kernel", "poisson_kernel_nd", "real_sph_harm"]
