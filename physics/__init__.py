"""Pure-numpy physics of cloudsieve.

Modules
-------
constants   physical constants (CODATA via scipy.constants) and unit factors
planck      Planck radiance per wavenumber, its inverse and temperature derivative
channels    spectral response functions and band-corrected channel radiances
atmosphere  pressure-level profiles, US Standard Atmosphere 1976, humidity, column water
absorption  channel-effective gas optical depths (water-vapour continuum, lines, dry gases)
transfer    Schwarzschild's equation along a slant path, level-to-space quantities
clearsky    clear-sky simulation of channel radiances from a profile and a surface
cloud       single-layer grey cloud: forward model and emissivity/optical-depth inversion
surface     emissivity of a smooth water surface against view angle (Fresnel, Kirchhoff)
fused       compiled float32 kernels of the clear-sky hot path, and the numpy/compiled dispatch

No module here reads files, prints or imports a user-interface library. Every array
function broadcasts over leading pixel axes; the level axis and the channel axis, where
present, are the two trailing axes in that order: ``(..., level, channel)``.
"""
