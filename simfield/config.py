"""Typed scenario schemas, their Hydra registration and validation.

Every configuration group of ``conf/`` has one dataclass here. The command-line entry points
turn Hydra's DictConfig into a :class:`Scenario` with :func:`to_scenario`, which also validates
every value (:func:`validate`) before any work starts; the stages only ever see these typed
objects. Units are in the field names or docstrings; angles in arcsec, wavelengths in nm,
times in s, areas in m^2.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import hashlib
import importlib.resources
import os
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Optional

from omegaconf import MISSING, DictConfig, OmegaConf
from omegaconf.errors import ConfigKeyError, MissingMandatoryValue, ValidationError

from ._typed import build_exact
from .errors import ConfigError, check_range, did_you_mean, plain_type, require

#: The Hydra configuration folder: the repository's ``conf/``, installed as package data
#: ``simfield.conf`` (so it is found from any directory, editable install or not).
CONF_DIR = str(importlib.resources.files("simfield.conf"))

__all__ = [
    "CONF_DIR",
    "BandConfig",
    "PupilConfig",
    "PSFConfig",
    "TelescopeConfig",
    "FieldPSFConfig",
    "DriftConfig",
    "PopulationConfig",
    "LensComponentConfig",
    "LensConfig",
    "DetectorConfig",
    "SurveyConfig",
    "DetectionConfig",
    "PhotometryConfig",
    "PhotozConfig",
    "ScoreConfig",
    "ConditionConfig",
    "SampleConfig",
    "SelectionConfig",
    "LimitsConfig",
    "Scenario",
    "register_configs",
    "to_scenario",
    "validate",
    "config_hash",
    "hash_and_yaml",
    "to_yaml",
    "default_cache_dir",
    "schema_type",
    "check_raw_value",
]


# --------------------------------------------------------------------------------------------
# telescope
# --------------------------------------------------------------------------------------------
@dataclass
class BandConfig:
    """One band: a top-hat throughput with soft edges (see :func:`simfield.bands.make_band`)."""

    name: str = MISSING
    center_nm: float = MISSING  #: centre wavelength (nm)
    width_nm: float = MISSING  #: full width at half maximum (nm)
    throughput: float = 0.4  #: total system throughput on the flat top (0..1)
    sky_mjy_sr: float = 0.2  #: zodiacal sky surface brightness in the band (MJy/sr)


@dataclass
class PupilConfig:
    """Entrance-pupil geometry (m). ``kind``: ``segmented`` (hexagonal tiles) or ``circular``."""

    kind: str = "segmented"
    segment_rings: int = 3  #: rings of hexagons around the centre position
    segment_flat_m: float = 0.85  #: flat-to-flat size of one segment (m)
    gap_m: float = 0.01  #: gap between neighbouring segments (m)
    central_hole: bool = True  #: leave the central segment position open
    obstruction_diameter_m: float = 0.0  #: central obstruction size (m), 0 for none
    obstruction_shape: str = "circle"  #: circle | hexagon
    strut_count: int = 0
    strut_width_m: float = 0.05
    strut_angles_deg: list[float] = field(default_factory=list)  #: empty: equally spaced
    strut_offset_m: float = 0.0  #: lateral offset of each strut from the centre line (m)
    segment_wfe_rms_nm: float = 0.0  #: per-segment piston/tip/tilt rms (nm)
    zernike_rms_nm: list[float] = field(default_factory=list)  #: global Zernike rms, Noll 4...
    grid_size: int = 256  #: least cells across the pupil raster (raised per PSF when needed)


@dataclass
class PSFConfig:
    """How PSFs are computed and used (see :mod:`simfield.optics.psf`)."""

    oversample: int = 1  #: least PSF samples per scene pixel (raised to Nyquist-sample)
    core_radius_arcsec: float = 1.5  #: half-size of the PSF used for every source (arcsec)
    spike_radius_arcsec: float = 8.0  #: half-size of the large PSF for bright sources (arcsec)
    bright_mag: float = 21.0  #: sources brighter than this (AB) get the large PSF
    n_wavelengths: int = 9  #: monochromatic PSFs per band
    reference_beta: float = -2.0  #: reference spectrum f_lambda ~ lambda^beta for band weighting
    jitter_mas: float = 5.0  #: pointing jitter rms per axis (milliarcsec)
    #: disk cache of computed PSFs; empty: the per-user cache, ``$XDG_CACHE_HOME/simfield/psf``
    #: or else ``~/.cache/simfield/psf`` (see :func:`default_cache_dir`)
    cache_dir: str = ""


@dataclass
class FieldPSFConfig:
    """Aberrations that vary across the field (see :mod:`simfield.optics.field`): focus and
    astigmatism (along the field radius) growing as (r / r_corner)^2, r_corner the half-diagonal
    of the survey field; PSFs on a grid of field points, interpolated."""

    enabled: bool = False
    corner_focus_nm: float = 50.0  #: rms of focus (Noll 4) added at the field corners (nm)
    corner_astig_nm: float = 70.0  #: rms of astigmatism (Noll 5, 6) at the field corners (nm)
    grid: int = 3  #: field points per side of the PSF grid
    n_modes: int = 3  #: eigen-PSFs kept beyond the mean (one extra convolution each)


@dataclass
class DriftConfig:
    """Wavefront drift between exposures (see :mod:`simfield.optics.drift`): each exposure adds a
    random-walk step of segment piston/tip/tilt to the wavefront; each exposure's PSF change is
    rendered through ``n_modes`` eigen-PSFs."""

    enabled: bool = False
    step_nm: float = 10.0  #: rms over a segment of each exposure's step (nm)
    n_modes: int = 2  #: eigen-PSFs of the exposures' PSF changes (one convolution per band each)


@dataclass
class TelescopeConfig:
    """A telescope: aperture, pupil, detector pixel scale and bands."""

    name: str = MISSING
    diameter_m: float = MISSING  #: circumscribed aperture diameter (m)
    collecting_area_m2: float = MISSING  #: clear collecting area (m^2)
    pixel_scale_arcsec: float = 0.04  #: detector pixel (arcsec)
    pixel_size_um: float = 18.0  #: physical detector pixel (micron)
    bands: list[BandConfig] = field(default_factory=list)
    pupil: PupilConfig = field(default_factory=PupilConfig)
    psf: PSFConfig = field(default_factory=PSFConfig)
    field_psf: FieldPSFConfig = field(default_factory=FieldPSFConfig)
    drift: DriftConfig = field(default_factory=DriftConfig)


# --------------------------------------------------------------------------------------------
# population
# --------------------------------------------------------------------------------------------
@dataclass
class PopulationConfig:
    """The galaxy and star population of the light cone."""

    mode: str = "luminosity_function"  #: luminosity_function | uniform (injection)
    z_min: float = 0.2
    z_max: float = 15.0
    abs_mag_faint: float = -13.0  #: faintest rest-UV absolute magnitude drawn (AB)
    mag_limit: float = 31.5  #: faintest apparent magnitude kept, in ``selection_band`` (AB)
    selection_band: str = ""  #: band for ``mag_limit``; empty: the reddest band
    uniform_mag_min: float = 24.0  #: uniform mode: apparent magnitude range (AB)
    uniform_mag_max: float = 31.0
    uniform_density_arcmin2: float = 50.0  #: uniform mode: sources per arcmin^2
    #: uniform mode: draw uniform in ``mag`` (selection-band apparent magnitude) or in
    #: ``abs_mag`` (rest-UV M_UV, to fill the cells of a selection function S(M_UV, z))
    uniform_in: str = "mag"
    uniform_abs_mag_min: float = -23.0  #: uniform_in abs_mag: M_UV range (AB)
    uniform_abs_mag_max: float = -17.0
    star_density_arcmin2: float = 3.0  #: foreground stars per arcmin^2 brighter than star_mag_max
    star_mag_min: float = 16.0
    star_mag_max: float = 30.0
    star_count_slope: float = 0.15  #: slope of the star counts d log10 N / dm (dex/mag)
    clumpy: bool = True  #: star-forming knots in blue, large galaxies
    max_sources: int = 200000  #: refuse fields expecting more candidate sources than this
    # contaminant families (simfield.population.dwarfs / .contaminants / .lines)
    dwarf_density_arcmin2: float = 0.3  #: cool dwarfs per arcmin^2 in the J-like band's range
    dwarf_mag_min: float = 20.0  #: J-like band (pivot nearest 1248 nm) magnitude range (AB)
    dwarf_mag_max: float = 29.0
    dwarf_count_slope: float = 0.1  #: d log10 N / dm of the dwarf counts (dex/mag)
    #: relative numbers of M7-M9.5, L0-L9.5 and T0-T8 dwarfs
    dwarf_type_fractions: list[float] = field(default_factory=lambda: [0.6, 0.25, 0.15])
    dusty_density_arcmin2: float = 0.5  #: dusty galaxies per arcmin^2 in the magnitude range
    dusty_mag_min: float = 21.0  #: selection-band magnitude range (AB)
    dusty_mag_max: float = 27.0
    dusty_z_min: float = 1.0
    dusty_z_max: float = 4.0
    dusty_av_median: float = 2.0  #: median V-band attenuation (mag)
    dusty_av_sigma_dex: float = 0.2  #: log-normal scatter of A_V (dex)
    quiescent_density_arcmin2: float = 0.04  #: quiescent galaxies per arcmin^2 in the range
    quiescent_mag_min: float = 21.0  #: selection-band magnitude range (AB)
    quiescent_mag_max: float = 27.0
    quiescent_z_min: float = 4.0  #: below, the light cone holds them (rest-K function)
    quiescent_z_max: float = 6.0
    quiescent_break: float = 2.6  #: median flux ratio across the Balmer break
    emission_lines: bool = True  #: nebular lines in star-forming and dusty galaxies
    ew_halpha_a: float = 20.0  #: rest EW(Halpha) = a (1+z)^slope (Angstrom)
    ew_halpha_slope: float = 1.8
    ew_halpha_z_cap: float = 6.0  #: EW(Halpha) held constant beyond this redshift
    ew_scatter_dex: float = 0.25  #: log-normal scatter of EW(Halpha) (dex)
    ew_halpha_max: float = 1500.0  #: largest rest EW(Halpha) drawn (Angstrom)
    oiii_hbeta_ratio: float = 4.0  #: [OIII] 500.7 / Hbeta flux ratio
    oii_hbeta_ratio: float = 1.5  #: [OII] 372.7 / Hbeta flux ratio
    # structure and placement (simfield.population.components / .clustering)
    #: bulge + disk for galaxies brighter than bulge_mag_max (selection band, AB); a magnitude
    #: brighter than every galaxy (e.g. 0) leaves all galaxies one Sersic profile
    bulge_mag_max: float = 27.0
    placement: str = "clustered"  #: clustered | uniform positions of the field galaxies
    #: write population.png: counts against published counts and colours
    #: (simfield.population.figure)
    figure: bool = False


# --------------------------------------------------------------------------------------------
# lens
# --------------------------------------------------------------------------------------------
@dataclass
class LensComponentConfig:
    """One mass component; positions are offsets from the field centre (arcsec)."""

    kind: str = MISSING  #: nfw | sis | sie | point | shear
    x_arcsec: float = 0.0
    y_arcsec: float = 0.0
    mass_msun: float = 0.0  #: nfw: M200c in Msun (not Msun/h; 200 x the critical density at the lens redshift); point: mass (Msun)
    concentration: float = 4.0  #: nfw
    sigma_kms: float = 0.0  #: sis / sie velocity dispersion (km/s)
    axis_ratio: float = 1.0  #: sie / nfw (elliptical potential)
    position_angle_deg: float = 0.0
    gamma1: float = 0.0  #: external shear, as seen by a source at lens.reference_redshift
    gamma2: float = 0.0
    truncation_arcsec: float = 0.0  #: sis: truncation radius (arcsec), 0 for none


@dataclass
class LensConfig:
    """Foreground lens. ``kind``: ``none`` or ``cluster``."""

    kind: str = "none"
    redshift: float = 0.4
    components: list[LensComponentConfig] = field(default_factory=list)
    n_members: int = 0  #: cluster member galaxies (isothermal lenses and sources)
    member_mag_bright: float = 19.0
    member_mag_faint: float = 25.0
    icl_fraction: float = 0.0  #: diffuse intracluster light, fraction of member light
    icl_r_half_arcsec: float = 12.0  #: half-light radius of the intracluster light (arcsec)
    icl_sersic_n: float = 1.5  #: Sersic index of the intracluster light
    reference_redshift: float = 9.0  #: critical curves / caustics are drawn for this z_s


# --------------------------------------------------------------------------------------------
# detector and survey
# --------------------------------------------------------------------------------------------
@dataclass
class DetectorConfig:
    """Infrared array and its up-the-ramp readout (see :mod:`simfield.detector`)."""

    #: correlated-double-sampling (CDS) read noise (e-): the noise of the difference of two
    #: frames, sqrt(2) x one frame's read noise (the frame noise used is read_noise_e / sqrt(2))
    read_noise_e: float = 12.0
    #: one frame's read noise (e-); null: use read_noise_e. When set, read_noise_e is derived
    #: as sqrt(2) x this (read_noise_e left at its preset value or set consistently)
    read_noise_frame_e: Optional[float] = None
    dark_e_s: float = 0.005  #: dark current (e-/s)
    gain_e_adu: float = 2.0  #: conversion gain (e-/ADU)
    full_well_e: float = 80000.0  #: full well (e-)
    n_groups: int = 8  #: groups in the ramp
    n_frames: int = 4  #: frames averaged per group
    ipc_alpha: float = 0.01  #: inter-pixel capacitance coupling to each of the four neighbours
    flat_rms: float = 0.01  #: pixel-to-pixel response rms (fraction)
    flat_error_rms: float = 0.002  #: rms error of the calibration flat (fraction), left in
    hot_pixel_fraction: float = 1e-4
    hot_dark_e_s: float = 0.5  #: hot pixels: dark current log-uniform in [1, 100] x this (e-/s)
    dead_pixel_fraction: float = 1e-4
    cosmic_ray_rate_cm2_s: float = 5.0  #: cosmic-ray events per cm^2 per s
    cosmic_ray_charge_e: float = 6000.0  #: median total charge of one event (e-)
    jump_threshold_sigma: float = 5.0  #: a ramp jump above this many sigma is detected
    dark_cal_ramps: int = 20  #: dark ramps averaged into the calibration dark (0: noiseless)
    poisson: bool = True
    read_noise: bool = True
    dark_current: bool = True
    ipc: bool = True
    flat: bool = True
    bad_pixels: bool = True
    cosmic_rays: bool = True
    saturation: bool = True
    quantize: bool = True  #: integer ADU readout
    #: correlated read noise (simfield.readout): 1/f noise common to the outputs and of each
    #: output, per-output offsets, reference pixels; off: white read noise only
    correlated_noise: bool = True
    n_channels: int = 4  #: outputs, each reading a vertical strip of the detector
    pixel_time_us: float = 10.0  #: time to read one pixel (us)
    row_overhead_pix: int = 12  #: line overhead after each row (pixel times)
    pink_common_e: float = 2.0  #: rms of the 1/f noise common to all outputs (e- per frame)
    pink_channel_e: float = 1.5  #: rms of each output's own 1/f noise (e- per frame)
    channel_offset_e: float = 10.0  #: rms of the per-output offsets (e- per frame)
    reference_pixels: int = 4  #: reference-pixel border on every side (pixels, no light)
    refpix_correction: bool = True  #: subtract offsets and row common mode from reference pixels
    refpix_half_rows: int = 8  #: common mode: running mean over 2 x this + 1 rows
    #: persistence (simfield.readout.persistence): charge trapped by bright point sources
    #: released into later exposures at the same detector pixels
    persistence: bool = True
    persistence_flagged: bool = False  #: the reduction knows and flags (leaves out) them
    persistence_onset_e: float = 20000.0  #: fluence above which charge is trapped (e-)
    persistence_fractions: list[float] = field(default_factory=lambda: [0.002, 0.001])
    persistence_tau_s: list[float] = field(default_factory=lambda: [300.0, 3000.0])
    exposure_gap_s: float = 60.0  #: time between the end of an exposure and the next (s)
    #: non-linearity S = Q (1 - beta Q) (simfield.readout.nonlinearity) and its correction
    nonlinearity: bool = True
    nonlinearity_at_full_well: float = 0.05  #: signal deficit at full well (fraction)
    nonlinearity_correction: bool = True  #: the reduction linearises (with a calibration error)
    nonlinearity_cal_rms: float = 0.02  #: rms relative error of the calibrated coefficient


@dataclass
class SurveyConfig:
    """The observed field, its exposures and mosaic grid (see :mod:`simfield.survey`)."""

    name: str = MISSING
    ra_deg: float = 150.0
    dec_deg: float = 2.0
    width_arcsec: float = 100.0
    height_arcsec: float = 100.0
    mosaic_pixel_arcsec: float = 0.03
    scene_oversample: int = 2  #: scene pixel = detector pixel / scene_oversample
    exposure_time_s: float = 1000.0  #: per exposure, effective (ramp slope baseline) (s)
    n_exposures: int = 4
    dither_step_arcsec: float = 0.5  #: step of the large dither pattern (arcsec)
    pointing_rms_arcsec: float = 0.003  #: random pointing error per axis (arcsec), known
    roll_deg: float = 0.0  #: detector +y east of north (deg)
    drizzle_kernel: str = "square"
    pixfrac: float = 0.8
    write_exposures: bool = False
    #: the mosaic is made in tiles of at most this many mosaic pixels a side, each from its
    #: own windows of the scene and the exposures (memory per tile, not per field)
    tile_pixels: int = 1536


# --------------------------------------------------------------------------------------------
# detection and score
# --------------------------------------------------------------------------------------------
@dataclass
class DetectionConfig:
    """Baseline detector run on each mosaic."""

    enabled: bool = True
    bands: list[str] = field(default_factory=list)  #: empty: the selection band (Scenario.detection_bands)
    threshold_sigma: float = 1.5
    npixels: int = 9
    kernel_fwhm_arcsec: float = 0.0  #: matched filter; 0: the band's PSF FWHM
    deblend: bool = True
    nlevels: int = 32
    contrast: float = 0.005
    aperture_radius_arcsec: float = 0.2
    background_box_arcsec: float = 3.0  #: mesh size of the background map (arcsec)
    background_filter: int = 3  #: median filter over background meshes (odd, meshes)
    kron_factor: float = 2.5  #: Kron aperture = kron_factor x first-moment radius
    kron_min_radius: float = 1.4  #: smallest Kron radius (in first-moment radii)

@dataclass
class PhotozConfig:
    """Photometric redshifts by template fitting of ``photometry.fits`` (simfield.photoz)."""

    enabled: bool = True
    z_min: float = 0.0  #: redshift grid, uniform in ln(1 + z)
    z_max: float = 20.0
    dz_over_1pz: float = 0.01  #: grid step in ln(1 + z), i.e. dz / (1 + z)
    z_cuts: list[float] = field(
        default_factory=lambda: [5.5, 6.5, 7.5, 9.5, 12.5])  #: P(z > cut) columns p_gt_<cut>
    prior: str = "none"  #: none | luminosity (population's UV luminosity function x dV/dz)
    #: star-forming UV slopes
    betas: list[float] = field(default_factory=lambda: [-2.8, -2.4, -2.0, -1.6, -1.2, -0.8, -0.4])
    sf_breaks: list[float] = field(
        default_factory=lambda: [1.1, 1.25, 1.45])  #: star-forming 380 nm break strengths
    #: dusty templates' V-band attenuation A_V (mag, Calzetti et al. 2000)
    a_v: list[float] = field(default_factory=lambda: [0.5, 1.0, 2.0, 3.0, 4.0])
    #: rest equivalent widths of [OIII] + H beta of line-emitter templates (nm); []: none
    line_ew_nm: list[float] = field(default_factory=list)


@dataclass
class PhotometryConfig:
    """Forced multi-band photometry of the detections (:mod:`simfield.photometry`)."""

    enabled: bool = True
    #: circular aperture radius (arcsec); 0.2" is ~1.5 x the broadest default PSF FWHM (b36,
    #: 0.136"): it holds ~80% of that band's light (its first dark ring), so the aperture
    #: correction is small and flat in radius, while the sky in it stays ~2x smaller than at 2 x
    #: FWHM (README, photometry.fits)
    aperture_radius_arcsec: float = 0.2
    #: band every other band's PSF is matched to; empty: the broadest PSF (largest FWHM)
    match_to: str = ""


@dataclass
class ScoreConfig:
    """Scoring of a detection catalogue against the truth."""

    enabled: bool = True
    match_radius_arcsec: float = 0.15
    mag_min: float = 22.0
    mag_max: float = 32.0
    mag_step: float = 0.25
    interval: float = 0.683  #: central credible level of per-bin intervals
    reference_mag: float = 28.0  #: purity is quoted at this measured magnitude
    report: bool = True
    match_radius_fwhm: float = 0.0  #: > 0: match radius = this x PSF FWHM (overrides arcsec)
    size_bins_arcsec: list[float] = field(
        default_factory=lambda: [0.0, 0.05, 0.1, 0.2, 0.4, 0.8, 1.6])  #: r_half bin edges
    z_bins: list[float] = field(
        default_factory=lambda: [0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 10.0, 12.0, 15.0])
    bright_star_mag: float = 22.0  #: stars brighter than this (AB, observed) can throw spikes
    spike_ref_mag: float = 18.0  #: reference magnitude of the spike / halo radii (AB)
    spike_length_arcsec: float = 6.0  #: spike length of a spike_ref_mag star (arcsec)
    halo_radius_arcsec: float = 1.5  #: halo radius of a spike_ref_mag star (arcsec)
    spike_angles_deg: list[float] = field(default_factory=list)  #: empty: measured on the PSF
    spike_half_width_deg: float = 4.0  #: angular half-width of a spike (deg)
    blend_radius_arcsec: float = 0.5  #: two truth images within this of a detection: blend
    fit_model: str = "logistic"  #: logistic | erf: headline completeness-limit fit


# --------------------------------------------------------------------------------------------
# selection of high-redshift samples
# --------------------------------------------------------------------------------------------
#: kinds of selection conditions (see :class:`ConditionConfig`)
CONDITION_KINDS = ("colour", "snr", "photoz", "exclude")


@dataclass
class ConditionConfig:
    """One condition of a sample (every condition of a sample must hold).

    - ``colour``: m_a - m_b (``bands: [a, b]``, AB mag) ``above`` and/or ``below`` a value,
      plus ``slope`` x (m_c - m_d) with ``slope_bands: [c, d]``; band a's flux is replaced by
      its ``limit_sigma`` upper limit where it is below that S/N (common practice);
    - ``snr``: flux / flux_err in every band of ``bands`` ``above`` and/or ``below`` a value
      ("not detected above 2 sigma": ``below: 2``);
    - ``photoz``: P(z > ``z_cut``) >= ``above`` (needs ``photoz.fits``);
    - ``exclude``: not selected by the sample named ``sample`` (disjoint samples).
    """

    kind: str = MISSING  #: colour | snr | photoz | exclude
    bands: list[str] = field(default_factory=list)
    above: Optional[float] = None
    below: Optional[float] = None
    slope: float = 0.0  #: colour: the threshold grows by slope x (m_c - m_d)
    slope_bands: list[str] = field(default_factory=list)  #: colour: [c, d]
    limit_sigma: float = 1.0  #: colour: upper limit of band a where its S/N is below this
    z_cut: float = 0.0  #: photoz: P(z > z_cut)
    sample: str = ""  #: exclude: name of the other sample


@dataclass
class SampleConfig:
    """A high-redshift sample: its name, target redshift window and conditions."""

    name: str = MISSING
    z_min: float = MISSING  #: target window (truth redshift), inclusive
    z_max: float = MISSING
    conditions: list[ConditionConfig] = field(default_factory=list)


@dataclass
class SelectionConfig:
    """Colour / S/N / photometric-redshift samples applied to ``photometry.fits`` and scored."""

    enabled: bool = True
    samples: list[SampleConfig] = field(default_factory=list)
    abs_mag_min: float = -24.0  #: M_UV bins of S(M_UV, z) and V_eff (AB)
    abs_mag_max: float = -16.0
    abs_mag_step: float = 1.0
    z_step: float = 0.25  #: redshift bin width of S(M_UV, z), from 0 to population.z_max
    interval: float = 0.683  #: central credible level of the Jeffreys intervals
    report: bool = True


@dataclass
class LimitsConfig:
    """Largest estimated resources a run may take (see :mod:`simfield.resources`); a run whose
    estimate exceeds one is refused before it starts, naming the key that raises the limit."""

    disk_gb: float = 20.0  #: files written into the run directory (GB, 1e9 bytes)
    memory_gb: float = 12.0  #: peak memory of the run and its worker processes (GB)


@dataclass
class ClusterConfig:
    """Where the mosaic tiles run (see :mod:`simfield.engine`); how a run is executed, not what
    it makes: left out of the configuration hash and of the YAML written with the outputs.

    ``kind``: ``none`` (local processes, ``workers``), ``local`` (a Dask LocalCluster on this
    machine), ``scheduler`` (a running Dask scheduler at ``address``) or ``slurm`` (Dask workers
    submitted as Slurm jobs through dask-jobqueue).
    """

    kind: str = "none"
    address: str = ""  #: scheduler: e.g. tcp://10.0.0.5:8786
    n_workers: int = 2  #: local: worker processes (or threads); slurm: jobs
    threads_per_worker: int = 1
    processes: bool = True  #: local: workers in processes (false: threads of this process)
    connect_timeout_s: float = 5.0  #: scheduler: give up connecting after this long (s)
    partition: str = ""  #: slurm: queue (-p); empty: the site's default
    account: str = ""  #: slurm: account (-A); empty: the user's default
    cores: int = 4  #: slurm: cores per job
    memory_gb: float = 16.0  #: slurm: memory per job (GB)
    walltime: str = "01:00:00"  #: slurm: per job, HH:MM:SS
    job_extra: list[str] = field(default_factory=list)  #: slurm: extra #SBATCH lines' options


CLUSTER_KINDS = ("none", "local", "scheduler", "slurm")

#: Top-level keys that say how a run executes, not what it makes: not hashed, not written.
EXECUTION_ONLY_KEYS = ("cluster",)


# --------------------------------------------------------------------------------------------
@dataclass
class Scenario:
    """One complete scenario: what simfield needs to make a field and score it."""

    seed: int = 0
    #: processes for the mosaic and detection tiles and the selection's samples; 0: one per core
    #: (at most one per tile)
    workers: int = 0
    telescope: TelescopeConfig = MISSING
    population: PopulationConfig = MISSING
    lens: LensConfig = MISSING
    detector: DetectorConfig = MISSING
    survey: SurveyConfig = MISSING
    detection: DetectionConfig = field(default_factory=DetectionConfig)
    photometry: PhotometryConfig = field(default_factory=PhotometryConfig)
    photoz: PhotozConfig = field(default_factory=PhotozConfig)
    score: ScoreConfig = field(default_factory=ScoreConfig)
    selection: SelectionConfig = field(default_factory=SelectionConfig)
    limits: LimitsConfig = field(default_factory=LimitsConfig)
    cluster: ClusterConfig = field(default_factory=ClusterConfig)

    @property
    def band_names(self) -> list[str]:
        return [b.name for b in self.telescope.bands]

    @property
    def selection_band(self) -> str:
        """``population.selection_band``, or else the reddest band (largest centre)."""
        if self.population.selection_band:
            return self.population.selection_band
        return max(self.telescope.bands, key=lambda b: b.center_nm).name

    @property
    def detection_bands(self) -> list[str]:
        """Bands detected and scored: ``detection.bands``, or else the selection band."""
        return list(self.detection.bands) or [self.selection_band]


def register_configs() -> None:
    """Register the schemas with Hydra's ConfigStore (called by the command-line entry points;
    once per process: the store is a process-wide singleton and storing costs ~0.1 s)."""
    from hydra.core.config_store import ConfigStore

    cs = ConfigStore.instance()
    if "scenario_schema.yaml" in cs.repo and "selection_schema.yaml" in cs.repo.get("selection", {}):
        return
    cs.store(name="scenario_schema", node=Scenario)
    cs.store(group="selection", name="selection_schema", node=SelectionConfig)


# --------------------------------------------------------------------------------------------
# validation
# --------------------------------------------------------------------------------------------
def _check_ranges(prefix: str, cfg, table) -> None:
    """:func:`~simfield.errors.check_range` of ``cfg.<field>``, named ``<prefix>.<field>``, for
    each row ``(field, lo, hi)`` or ``(field, lo, hi, ends)`` of ``table``, in its order;
    ``ends`` are the interval's brackets: ``"[]"`` (the default), ``"(]"``, ``"[)"`` or
    ``"()"``."""
    for name, lo, hi, *ends in table:
        left, right = ends[0] if ends else "[]"
        check_range(f"{prefix}.{name}", getattr(cfg, name), lo, hi, lo_open=left == "(",
                    hi_open=right == ")")


def _validate_telescope(t: TelescopeConfig) -> None:
    check_range("telescope.diameter_m", t.diameter_m, 0.01, 100)
    check_range("telescope.collecting_area_m2", t.collecting_area_m2, 0,
                3.1416 / 4 * t.diameter_m**2 * 1.0001, lo_open=True)
    check_range("telescope.pixel_scale_arcsec", t.pixel_scale_arcsec, 0, 10, lo_open=True)
    check_range("telescope.pixel_size_um", t.pixel_size_um, 0.1, 1000)
    require(len(t.bands) > 0, "telescope.bands", t.bands, "must list at least one band")
    names = [b.name for b in t.bands]
    require(len(set(names)) == len(names), "telescope.bands", names, "band names must be unique")
    for i, b in enumerate(t.bands):
        k = f"telescope.bands.{i}"
        require(bool(b.name) and b.name.isidentifier(), f"{k}.name", b.name,
                "must be a non-empty identifier (letters, digits, _)")
        check_range(f"{k}.center_nm", b.center_nm, 100, 30000)
        check_range(f"{k}.width_nm", b.width_nm, 0, b.center_nm, lo_open=True, hi_open=True)
        check_range(f"{k}.throughput", b.throughput, 0, 1, lo_open=True)
        check_range(f"{k}.sky_mjy_sr", b.sky_mjy_sr, 0, 1e4)
    p = t.pupil
    require(p.kind in ("segmented", "circular"), "telescope.pupil.kind", p.kind,
            "must be one of: segmented, circular")
    require(p.obstruction_shape in ("circle", "hexagon"), "telescope.pupil.obstruction_shape",
            p.obstruction_shape, "must be one of: circle, hexagon")
    check_range("telescope.pupil.segment_rings", p.segment_rings, 0, 20)
    check_range("telescope.pupil.segment_flat_m", p.segment_flat_m, 0.01, 100)
    check_range("telescope.pupil.gap_m", p.gap_m, 0, p.segment_flat_m, hi_open=True)
    check_range("telescope.pupil.obstruction_diameter_m", p.obstruction_diameter_m, 0,
                t.diameter_m, hi_open=True)
    check_range("telescope.pupil.strut_count", p.strut_count, 0, 12)
    check_range("telescope.pupil.strut_width_m", p.strut_width_m, 0, t.diameter_m / 4)
    for j, a in enumerate(p.strut_angles_deg):
        check_range(f"telescope.pupil.strut_angles_deg.{j}", a, -360, 360)
    require(not p.strut_angles_deg or len(p.strut_angles_deg) == p.strut_count,
            "telescope.pupil.strut_angles_deg", list(p.strut_angles_deg),
            f"must be empty or list telescope.pupil.strut_count={p.strut_count} angles")
    check_range("telescope.pupil.segment_wfe_rms_nm", p.segment_wfe_rms_nm, 0, 1000)
    for j, z in enumerate(p.zernike_rms_nm):
        check_range(f"telescope.pupil.zernike_rms_nm.{j}", z, 0, 1000)
    check_range("telescope.pupil.grid_size", p.grid_size, 64, 4096)
    s = t.psf
    check_range("telescope.psf.oversample", s.oversample, 1, 8)
    check_range("telescope.psf.core_radius_arcsec", s.core_radius_arcsec, 0, 60, lo_open=True)
    check_range("telescope.psf.spike_radius_arcsec", s.spike_radius_arcsec,
                s.core_radius_arcsec, 120)
    check_range("telescope.psf.n_wavelengths", s.n_wavelengths, 1, 100)
    check_range("telescope.psf.jitter_mas", s.jitter_mas, 0, 1000)
    check_range("telescope.psf.reference_beta", s.reference_beta, -10, 10)
    check_range("telescope.psf.bright_mag", s.bright_mag, 0, 40)
    require("\0" not in s.cache_dir, "telescope.psf.cache_dir", s.cache_dir,
            "must be a directory path (empty: the per-user cache)")
    f = t.field_psf
    _check_ranges("telescope.field_psf", f, (("corner_focus_nm", 0, 500),
                                             ("corner_astig_nm", 0, 500), ("grid", 2, 7)))
    check_range("telescope.field_psf.n_modes", f.n_modes, 1, f.grid * f.grid - 1)
    _check_ranges("telescope.drift", t.drift, (("step_nm", 0, 200), ("n_modes", 1, 8)))
    check_range("telescope.pupil.strut_offset_m", p.strut_offset_m, -t.diameter_m / 2,
                t.diameter_m / 2)


def _validate_population(p: PopulationConfig, bands: list[str]) -> None:
    require(p.mode in ("luminosity_function", "uniform"), "population.mode", p.mode,
            "must be one of: luminosity_function, uniform")
    check_range("population.z_min", p.z_min, 0, 30, lo_open=True)
    check_range("population.z_max", p.z_max, 0, 30, lo_open=True)
    require(p.z_max > p.z_min, "population.z_max", p.z_max,
            f"must be greater than population.z_min={p.z_min}")
    check_range("population.abs_mag_faint", p.abs_mag_faint, -30, -5)
    check_range("population.mag_limit", p.mag_limit, 10, 40)
    require(p.selection_band == "" or p.selection_band in bands, "population.selection_band",
            p.selection_band, f"must be empty or one of: {', '.join(bands)}")
    check_range("population.uniform_mag_min", p.uniform_mag_min, 10, 40)
    check_range("population.uniform_mag_max", p.uniform_mag_max, p.uniform_mag_min, 40,
                lo_open=True)
    check_range("population.uniform_density_arcmin2", p.uniform_density_arcmin2, 0, 1e5)
    require(p.uniform_in in ("mag", "abs_mag"), "population.uniform_in", p.uniform_in,
            "must be one of: mag, abs_mag")
    check_range("population.uniform_abs_mag_min", p.uniform_abs_mag_min, -30, -5)
    check_range("population.uniform_abs_mag_max", p.uniform_abs_mag_max, p.uniform_abs_mag_min,
                -5, lo_open=True)
    check_range("population.star_density_arcmin2", p.star_density_arcmin2, 0, 1e4)
    check_range("population.star_mag_min", p.star_mag_min, 5, 40)
    check_range("population.star_mag_max", p.star_mag_max, p.star_mag_min, 40)
    check_range("population.star_count_slope", p.star_count_slope, -1, 1)
    check_range("population.max_sources", p.max_sources, 1, 1e8)
    _validate_contaminants(p)


def _validate_contaminants(p: PopulationConfig) -> None:
    for fam in ("dwarf", "dusty", "quiescent"):
        check_range(f"population.{fam}_density_arcmin2", getattr(p, f"{fam}_density_arcmin2"),
                    0, 1e3)
        lo = getattr(p, f"{fam}_mag_min")
        check_range(f"population.{fam}_mag_min", lo, 10, 40)
        check_range(f"population.{fam}_mag_max", getattr(p, f"{fam}_mag_max"), lo, 40,
                    lo_open=True)
    check_range("population.dwarf_count_slope", p.dwarf_count_slope, -1, 1)
    fr = list(p.dwarf_type_fractions)
    require(len(fr) == 3 and all(isinstance(f, (int, float)) and not isinstance(f, bool)
                                 and math.isfinite(f) and f >= 0 for f in fr) and sum(fr) > 0,
            "population.dwarf_type_fractions", fr,
            "must be 3 numbers >= 0 (M7-M9.5, L, T) with a positive sum")
    check_range("population.dusty_z_min", p.dusty_z_min, 0.5, 6)
    check_range("population.dusty_z_max", p.dusty_z_max, p.dusty_z_min + 0.5, 6)
    check_range("population.dusty_av_median", p.dusty_av_median, 0.3, 6)
    check_range("population.dusty_av_sigma_dex", p.dusty_av_sigma_dex, 0, 1)
    check_range("population.quiescent_z_min", p.quiescent_z_min, 0.5, 8)
    check_range("population.quiescent_z_max", p.quiescent_z_max, p.quiescent_z_min, 8,
                lo_open=True)
    check_range("population.quiescent_break", p.quiescent_break, 1.8, 3.5)
    check_range("population.ew_halpha_a", p.ew_halpha_a, 0, 1000)
    check_range("population.ew_halpha_slope", p.ew_halpha_slope, 0, 4)
    check_range("population.ew_halpha_z_cap", p.ew_halpha_z_cap, 0, 20)
    check_range("population.ew_scatter_dex", p.ew_scatter_dex, 0, 1)
    check_range("population.ew_halpha_max", p.ew_halpha_max, 0, 5000)
    check_range("population.oiii_hbeta_ratio", p.oiii_hbeta_ratio, 0, 20)
    check_range("population.oii_hbeta_ratio", p.oii_hbeta_ratio, 0, 20)
    check_range("population.bulge_mag_max", p.bulge_mag_max, -1e9, 40)
    require(p.placement in ("clustered", "uniform"), "population.placement", p.placement,
            "must be clustered or uniform")


def _validate_lens(lens: LensConfig, z_max: float) -> None:
    require(lens.kind in ("none", "cluster"), "lens.kind", lens.kind,
            "must be one of: none, cluster")
    # checked whether or not a lens is used, so a setting is never silently ignored
    check_range("lens.redshift", lens.redshift, 0, z_max, lo_open=True, hi_open=True)
    check_range("lens.reference_redshift", lens.reference_redshift, lens.redshift, 30,
                lo_open=True)
    check_range("lens.n_members", lens.n_members, 0, 10000)
    check_range("lens.icl_fraction", lens.icl_fraction, 0, 1)
    check_range("lens.icl_r_half_arcsec", lens.icl_r_half_arcsec, 0.1, 600)
    check_range("lens.icl_sersic_n", lens.icl_sersic_n, 0.3, 6.2)
    for i, c in enumerate(lens.components):
        k = f"lens.components.{i}"
        require(c.kind in ("nfw", "sis", "sie", "point", "shear"), f"{k}.kind", c.kind,
                "must be one of: nfw, sis, sie, point, shear")
        check_range(f"{k}.x_arcsec", c.x_arcsec, -3600, 3600)
        check_range(f"{k}.y_arcsec", c.y_arcsec, -3600, 3600)
        check_range(f"{k}.mass_msun", c.mass_msun, 0, 1e17)
        check_range(f"{k}.concentration", c.concentration, 0, 100, lo_open=True)
        check_range(f"{k}.sigma_kms", c.sigma_kms, 0, 3000)
        check_range(f"{k}.axis_ratio", c.axis_ratio, 0, 1, lo_open=True)
        check_range(f"{k}.position_angle_deg", c.position_angle_deg, -360, 360)
        check_range(f"{k}.gamma1", c.gamma1, -0.5, 0.5)
        check_range(f"{k}.gamma2", c.gamma2, -0.5, 0.5)
        check_range(f"{k}.truncation_arcsec", c.truncation_arcsec, 0, 3600)
        if c.kind == "nfw":
            check_range(f"{k}.mass_msun", c.mass_msun, 1e8, 1e17)
            check_range(f"{k}.axis_ratio", c.axis_ratio, 0.5, 1)
        if c.kind == "point":
            check_range(f"{k}.mass_msun", c.mass_msun, 0, 1e17, lo_open=True)
        if c.kind in ("sis", "sie"):
            check_range(f"{k}.sigma_kms", c.sigma_kms, 0, 3000, lo_open=True)
    check_range("lens.member_mag_bright", lens.member_mag_bright, 5, 40)
    check_range("lens.member_mag_faint", lens.member_mag_faint, lens.member_mag_bright, 40,
                lo_open=True)


#: the preset value of detector.read_noise_e: with read_noise_frame_e set, this value counts as
#: "not set" and is replaced by the derived one
_READ_NOISE_E_DEFAULT = DetectorConfig.read_noise_e


def cds_read_noise_e(frame_e: float) -> float:
    """CDS read noise (e-) of one frame's read noise ``frame_e`` (e-): sqrt(2) x frame_e, the
    noise of the difference of two independent reads."""
    return math.sqrt(2.0) * float(frame_e)


def consistent_read_noise(cds_e: float, frame_e: float) -> bool:
    """Whether CDS read noise ``cds_e`` and frame read noise ``frame_e`` (e-) agree (0.1%)."""
    return math.isclose(cds_e, cds_read_noise_e(frame_e), rel_tol=1e-3, abs_tol=1e-6)


def read_noise_conflict(cds_e: float, frame_e: float) -> ConfigError:
    """The one-line refusal of detector.read_noise_e and read_noise_frame_e set apart."""
    return ConfigError("detector.read_noise_frame_e", frame_e,
                       f"gives a CDS read noise of sqrt(2) x {frame_e:g} = "
                       f"{cds_read_noise_e(frame_e):.4g} e-, but detector.read_noise_e is "
                       f"{cds_e:g}; set only one of them (or both consistently)")


def frame_read_noise_e(det: DetectorConfig) -> float:
    """Read noise of one frame (e-), 0 with ``det.read_noise`` off: ``read_noise_frame_e``
    when set, else ``read_noise_e`` / sqrt(2) (read_noise_e is the CDS noise). The one place
    the detector simulation and the predicted depths take the frame noise from."""
    if not det.read_noise:
        return 0.0
    if det.read_noise_frame_e is not None:
        return float(det.read_noise_frame_e)
    return float(det.read_noise_e) / math.sqrt(2.0)


def _resolve_read_noise(d: DetectorConfig) -> None:
    """With read_noise_frame_e set, derive read_noise_e = sqrt(2) x it; refuse a conflict."""
    if d.read_noise_frame_e is None:
        return
    check_range("detector.read_noise_frame_e", d.read_noise_frame_e, 0, 1000)
    if d.read_noise_e != _READ_NOISE_E_DEFAULT and \
            not consistent_read_noise(d.read_noise_e, d.read_noise_frame_e):
        raise read_noise_conflict(d.read_noise_e, d.read_noise_frame_e)
    d.read_noise_e = cds_read_noise_e(d.read_noise_frame_e)


def _validate_detector(d: DetectorConfig) -> None:
    _resolve_read_noise(d)
    _check_ranges("detector", d, (
        ("read_noise_e", 0, 1000), ("dark_e_s", 0, 100), ("gain_e_adu", 0, 100, "(]"),
        ("full_well_e", 0, 1e7, "(]"), ("n_groups", 2, 1000), ("n_frames", 1, 100),
        ("ipc_alpha", 0, 0.05), ("flat_rms", 0, 0.5), ("flat_error_rms", 0, 0.5),
        ("hot_pixel_fraction", 0, 0.1), ("hot_dark_e_s", 0, 1e4),
        ("dead_pixel_fraction", 0, 0.1), ("cosmic_ray_rate_cm2_s", 0, 1000),
        ("cosmic_ray_charge_e", 0, 1e7), ("jump_threshold_sigma", 0, 1000, "(]"),
        ("dark_cal_ramps", 0, 10000), ("n_channels", 1, 64)))
    require(isinstance(d.n_channels, int), "detector.n_channels", d.n_channels,
            "must be a whole number")
    _check_ranges("detector", d, (  # readout: 1/f noise, reference pixels, persistence, NL
        ("pixel_time_us", 0, 1e4, "(]"), ("row_overhead_pix", 0, 10000),
        ("pink_common_e", 0, 1000), ("pink_channel_e", 0, 1000), ("channel_offset_e", 0, 1e5),
        ("reference_pixels", 0, 64), ("refpix_half_rows", 0, 10000),
        ("persistence_onset_e", 0, 1e7, "(]"), ("exposure_gap_s", 0, 1e6),
        ("nonlinearity_at_full_well", 0, 0.25), ("nonlinearity_cal_rms", 0, 1)))
    fr, ta = list(d.persistence_fractions), list(d.persistence_tau_s)
    require(len(fr) == len(ta) and len(fr) >= 1, "detector.persistence_fractions", fr,
            f"must be a non-empty list as long as detector.persistence_tau_s ({len(ta)})")
    for i, v in enumerate(fr):
        check_range(f"detector.persistence_fractions[{i}]", v, 0, 1)
    for i, v in enumerate(ta):
        check_range(f"detector.persistence_tau_s[{i}]", v, 0, 1e7, lo_open=True)
    require(not (d.correlated_noise and d.refpix_correction) or d.reference_pixels >= 1,
            "detector.reference_pixels", d.reference_pixels,
            "must be >= 1 when detector.refpix_correction is on (the correction reads them)")


def _validate_survey(s: SurveyConfig) -> None:
    check_range("survey.ra_deg", s.ra_deg, 0, 360, hi_open=True)
    check_range("survey.dec_deg", s.dec_deg, -89, 89)
    check_range("survey.width_arcsec", s.width_arcsec, 1, 3600)
    check_range("survey.height_arcsec", s.height_arcsec, 1, 3600)
    check_range("survey.mosaic_pixel_arcsec", s.mosaic_pixel_arcsec, 0.001, 10)
    check_range("survey.scene_oversample", s.scene_oversample, 1, 8)
    check_range("survey.exposure_time_s", s.exposure_time_s, 0, 1e6, lo_open=True)
    check_range("survey.n_exposures", s.n_exposures, 1, 1000)
    check_range("survey.dither_step_arcsec", s.dither_step_arcsec, 0, 60)
    check_range("survey.pointing_rms_arcsec", s.pointing_rms_arcsec, 0, 10)
    check_range("survey.roll_deg", s.roll_deg, -360, 360)
    require(s.drizzle_kernel in ("square", "point", "turbo", "gaussian", "lanczos3"),
            "survey.drizzle_kernel", s.drizzle_kernel,
            "must be one of: square, point, turbo, gaussian, lanczos3")
    check_range("survey.pixfrac", s.pixfrac, 0, 1, lo_open=True)
    check_range("survey.tile_pixels", s.tile_pixels, 64, 100_000)


def _validate_detection(d: DetectionConfig, bands: list[str]) -> None:
    for i, b in enumerate(d.bands):
        require(b in bands, f"detection.bands.{i}", b, f"must be one of: {', '.join(bands)}")
    require(len(set(d.bands)) == len(d.bands), "detection.bands", list(d.bands),
            "must not list a band twice")
    check_range("detection.threshold_sigma", d.threshold_sigma, 0, 1000, lo_open=True)
    check_range("detection.npixels", d.npixels, 1, 10000)
    check_range("detection.kernel_fwhm_arcsec", d.kernel_fwhm_arcsec, 0, 10)
    check_range("detection.nlevels", d.nlevels, 1, 1000)
    check_range("detection.contrast", d.contrast, 0, 1)
    check_range("detection.aperture_radius_arcsec", d.aperture_radius_arcsec, 0, 60,
                lo_open=True)
    check_range("detection.background_box_arcsec", d.background_box_arcsec, 0, 3600,
                lo_open=True)
    check_range("detection.background_filter", d.background_filter, 1, 99)
    require(int(d.background_filter) % 2 == 1, "detection.background_filter",
            d.background_filter, "must be an odd number of meshes")
    check_range("detection.kron_factor", d.kron_factor, 0, 10, lo_open=True)
    check_range("detection.kron_min_radius", d.kron_min_radius, 0, 10)

_PHOTOZ_PRIORS = ("none", "luminosity")


def _validate_photoz(p: PhotozConfig) -> None:
    check_range("photoz.z_min", p.z_min, 0, 30)
    check_range("photoz.z_max", p.z_max, p.z_min, 30, lo_open=True)
    check_range("photoz.dz_over_1pz", p.dz_over_1pz, 0, 0.2, lo_open=True)
    n_z = math.log((1 + p.z_max) / (1 + p.z_min)) / p.dz_over_1pz
    require(n_z <= 20000, "photoz.dz_over_1pz", p.dz_over_1pz,
            f"gives {n_z:.0f} grid points from photoz.z_min to photoz.z_max: at most 20000")
    for j, c in enumerate(p.z_cuts):
        require(isinstance(c, (int, float)) and not isinstance(c, bool) and p.z_min < c < p.z_max,
                f"photoz.z_cuts.{j}", c, f"must be a redshift inside the grid "
                f"(photoz.z_min={p.z_min:g}, photoz.z_max={p.z_max:g})")
    require(p.prior in _PHOTOZ_PRIORS, "photoz.prior", p.prior,
            f"must be one of: {', '.join(_PHOTOZ_PRIORS)}")
    require(len(p.betas) > 0, "photoz.betas", list(p.betas), "must list at least one UV slope")
    for j, b in enumerate(p.betas):
        check_range(f"photoz.betas.{j}", b, -4, 3)
    require(len(p.sf_breaks) > 0, "photoz.sf_breaks", list(p.sf_breaks),
            "must list at least one break strength")
    for j, k in enumerate(p.sf_breaks):
        check_range(f"photoz.sf_breaks.{j}", k, 1, 5)
    for j, a in enumerate(p.a_v):
        check_range(f"photoz.a_v.{j}", a, 0, 10)
    for j, e in enumerate(p.line_ew_nm):
        check_range(f"photoz.line_ew_nm.{j}", e, 0, 1000, lo_open=True)


def _validate_photometry(p: PhotometryConfig, bands: list[str]) -> None:
    check_range("photometry.aperture_radius_arcsec", p.aperture_radius_arcsec, 0, 10,
                lo_open=True)
    require(p.match_to == "" or p.match_to in bands, "photometry.match_to", p.match_to,
            f"must be empty (the broadest PSF) or one of: {', '.join(bands)}")


def _validate_score(s: ScoreConfig) -> None:
    check_range("score.match_radius_arcsec", s.match_radius_arcsec, 0, 10, lo_open=True)
    check_range("score.mag_min", s.mag_min, 0, 50)
    check_range("score.mag_max", s.mag_max, s.mag_min, 50, lo_open=True)
    require(s.mag_min <= s.reference_mag <= s.mag_max, "score.reference_mag", s.reference_mag,
            f"must be in [{s.mag_min:g}, {s.mag_max:g}] (score.mag_min..score.mag_max: purity "
            "is quoted in the bin holding it)")
    check_range("score.mag_step", s.mag_step, 0, s.mag_max - s.mag_min, lo_open=True)
    check_range("score.interval", s.interval, 0, 1, lo_open=True, hi_open=True)
    check_range("score.match_radius_fwhm", s.match_radius_fwhm, 0, 20)
    for key, edges in (("score.size_bins_arcsec", s.size_bins_arcsec), ("score.z_bins", s.z_bins)):
        for j, e in enumerate(edges):
            require(isinstance(e, (int, float)) and not isinstance(e, bool) and math.isfinite(e),
                    f"{key}[{j}]", e, "must be a finite number (a bin edge)")
        require(len(edges) >= 2 and all(b > a for a, b in zip(edges, edges[1:]))
                and edges[0] >= 0, key, list(edges),
                "must list at least two increasing, non-negative bin edges")
    check_range("score.bright_star_mag", s.bright_star_mag, 0, 40)
    check_range("score.spike_ref_mag", s.spike_ref_mag, 0, 40)
    check_range("score.spike_length_arcsec", s.spike_length_arcsec, 0, 600)
    check_range("score.halo_radius_arcsec", s.halo_radius_arcsec, 0, 600)
    for j, a in enumerate(s.spike_angles_deg):
        check_range(f"score.spike_angles_deg.{j}", a, -360, 360)
    check_range("score.spike_half_width_deg", s.spike_half_width_deg, 0, 90, lo_open=True)
    check_range("score.blend_radius_arcsec", s.blend_radius_arcsec, 0, 60)
    require(s.fit_model in ("logistic", "erf"), "score.fit_model", s.fit_model,
            "must be one of: logistic, erf")


def _validate_condition(c: ConditionConfig, key: str, bands: list[str], names: list[str],
                        plain: set) -> None:
    require(c.kind in CONDITION_KINDS, f"{key}.kind", c.kind,
            f"must be one of {', '.join(CONDITION_KINDS)}")
    hint = " (selection=none, or samples of your own, for another band set)"
    for j, b in enumerate(c.bands):
        require(b in bands, f"{key}.bands.{j}", b,
                f"must be one of the bands {', '.join(bands)}{hint}")
    for j, b in enumerate(c.slope_bands):
        require(b in bands, f"{key}.slope_bands.{j}", b,
                f"must be one of the bands {', '.join(bands)}{hint}")
    for k, v in (("above", c.above), ("below", c.below)):
        if v is not None:
            check_range(f"{key}.{k}", v, -100, 100)
    check_range(f"{key}.slope", c.slope, -20, 20)
    check_range(f"{key}.limit_sigma", c.limit_sigma, 0, 100, lo_open=True)
    check_range(f"{key}.z_cut", c.z_cut, 0, 30)
    if c.kind == "exclude":
        listed = ", ".join(f"{n} ({key.split('.conditions')[0].rsplit('.', 1)[0]}.{i}.name)"
                           for i, n in enumerate(names))
        require(c.sample in names, f"{key}.sample", c.sample,
                f"must name another sample: one of {listed or '(none)'}")
        require(c.sample in plain, f"{key}.sample", c.sample,
                "must name a sample without exclude conditions of its own")
        return
    if c.kind == "photoz":
        require(c.above is not None and 0 <= c.above <= 1, f"{key}.above", c.above,
                "must be the least P(z > z_cut), in [0, 1]")
        return
    require(c.above is not None or c.below is not None, f"{key}.above", c.above,
            f"or {key}.below must be given")
    if c.above is not None and c.below is not None:
        require(c.above < c.below, f"{key}.below", c.below,
                f"must be > {key}.above ({c.above:g})")
    if c.kind == "colour":
        require(len(c.bands) == 2 and c.bands[0] != c.bands[1], f"{key}.bands", list(c.bands),
                "must be two different bands [a, b] (colour m_a - m_b)")
        require(len(c.slope_bands) in (0, 2), f"{key}.slope_bands", list(c.slope_bands),
                "must be empty or two bands [c, d]")
    else:
        require(len(c.bands) >= 1, f"{key}.bands", list(c.bands), "must list at least one band")


def _validate_selection(s: SelectionConfig, bands: list[str], z_max: float = 30.0,
                        photoz: PhotozConfig | None = None) -> None:
    check_range("selection.abs_mag_min", s.abs_mag_min, -30, 0)
    check_range("selection.abs_mag_max", s.abs_mag_max, -30, 0)
    require(s.abs_mag_max > s.abs_mag_min, "selection.abs_mag_max", s.abs_mag_max,
            f"must be > selection.abs_mag_min ({s.abs_mag_min:g})")
    check_range("selection.abs_mag_step", s.abs_mag_step, 0, 30, lo_open=True)
    require(s.abs_mag_step <= s.abs_mag_max - s.abs_mag_min, "selection.abs_mag_step",
            s.abs_mag_step, "must be at most selection.abs_mag_max - selection.abs_mag_min")
    check_range("selection.z_step", s.z_step, 0, 30, lo_open=True)
    require(s.z_step <= z_max, "selection.z_step", s.z_step,
            f"must be at most population.z_max ({z_max:g})")
    check_range("selection.interval", s.interval, 0, 1, lo_open=True, hi_open=True)
    names = [p.name for p in s.samples]
    plain = {p.name for p in s.samples if all(c.kind != "exclude" for c in p.conditions)}
    for i, p in enumerate(s.samples):
        key = f"selection.samples.{i}"
        require(bool(str(p.name).strip()) and str(p.name).replace("_", "").isalnum(),
                f"{key}.name", p.name, "must be a name of letters, digits and _")
        require(names.count(p.name) == 1, f"{key}.name", p.name, "must be unique")
        check_range(f"{key}.z_min", p.z_min, 0, 30)
        check_range(f"{key}.z_max", p.z_max, 0, 30)
        require(p.z_max > p.z_min, f"{key}.z_max", p.z_max, f"must be > {key}.z_min ({p.z_min:g})")
        require(len(p.conditions) > 0, f"{key}.conditions", [], "must hold at least one condition")
        for j, c in enumerate(p.conditions):
            _validate_condition(c, f"{key}.conditions.{j}", bands, names, plain)
            if c.kind == "photoz" and photoz is not None:
                ck = f"{key}.conditions.{j}"
                require(photoz.enabled, f"{ck}.kind", c.kind,
                        "needs photometric redshifts: photoz.enabled=true")
                require(any(abs(c.z_cut - zc) < 1e-9 for zc in photoz.z_cuts), f"{ck}.z_cut",
                        c.z_cut, f"must be one of photoz.z_cuts "
                                 f"({', '.join(f'{zc:g}' for zc in photoz.z_cuts)})")

def _validate_limits(lim: LimitsConfig) -> None:
    _check_ranges("limits", lim, (("disk_gb", 0, 1e6, "(]"), ("memory_gb", 0, 1e5, "(]")))


def _validate_cluster(c: ClusterConfig) -> None:
    import re

    require(c.kind in CLUSTER_KINDS, "cluster.kind", c.kind, f"must be one of "
            f"{', '.join(CLUSTER_KINDS)}")
    _check_ranges("cluster", c, (("n_workers", 1, 10000), ("threads_per_worker", 1, 256),
                                 ("connect_timeout_s", 0, 600, "(]"), ("cores", 1, 1024),
                                 ("memory_gb", 0, 1e5, "(]")))
    if c.kind == "scheduler":
        require(bool(re.fullmatch(r"(tcp://|tls://)?[\w.\-]+:\d{1,5}", c.address)),
                "cluster.address", c.address, "must be a scheduler address host:port or "
                "tcp://host:port (cluster=scheduler)")
    require(bool(re.fullmatch(r"(\d+-)?\d{1,3}:\d{2}:\d{2}", c.walltime)), "cluster.walltime",
            c.walltime, "must be HH:MM:SS or D-HH:MM:SS")
    for key, v in (("cluster.partition", c.partition), ("cluster.account", c.account)):
        require(bool(re.fullmatch(r"[\w.\-]*", v)), key, v,
                "must be a plain Slurm name (letters, digits, _ . -)")


def _validate_names(sc: Scenario) -> None:
    for key, name in (("telescope.name", sc.telescope.name), ("survey.name", sc.survey.name)):
        require(bool(str(name).strip()), key, name, "must be a non-empty name")


def validate(sc: Scenario) -> Scenario:
    """Check every value of ``sc``; raise :class:`ConfigError` on the first bad one."""
    require(isinstance(sc.seed, int) and sc.seed >= 0, "seed", sc.seed,
            "must be a non-negative integer")
    check_range("workers", sc.workers, 0, 256)
    _validate_cluster(sc.cluster)
    _validate_names(sc)
    _validate_telescope(sc.telescope)
    bands = sc.band_names
    _validate_population(sc.population, bands)
    _validate_lens(sc.lens, sc.population.z_max)
    _validate_detector(sc.detector)
    _validate_survey(sc.survey)
    _validate_detection(sc.detection, bands)
    _validate_photometry(sc.photometry, bands)
    _validate_photoz(sc.photoz)
    _validate_score(sc.score)
    _validate_selection(sc.selection, bands, sc.population.z_max, sc.photoz)
    _validate_limits(sc.limits)
    return sc


def to_scenario(cfg: DictConfig | dict[str, Any]) -> Scenario:
    """Turn a (Hydra) configuration into a validated :class:`Scenario`.

    Keys Hydra adds (``hydra``) are ignored. Raises :class:`ConfigError` for bad values and for
    keys the schema does not know.
    """
    if isinstance(cfg, DictConfig):
        data = OmegaConf.to_container(cfg, resolve=True)
    else:
        data = dict(cfg)
        _check_raw_booleans(data)  # a DictConfig has converted them already
    data.pop("hydra", None)
    try:
        sc = build_exact(Scenario, data)  # exactly typed data: OmegaConf's result, ~50x sooner
        if sc is None:
            sc = OmegaConf.to_object(OmegaConf.merge(OmegaConf.structured(Scenario), data))
    except ConfigKeyError as exc:  # a key the schema does not know
        key = str(exc.full_key or exc.key)
        parent = key.rpartition(".")[0]
        known = _known_keys(parent)
        raise ConfigError(key, _lookup(data, key),
                          f"is not a key of {parent or 'the scenario'}"
                          f"{did_you_mean(key.rpartition('.')[2], known)}; known keys: "
                          f"{', '.join(known)}") from None
    except (ValidationError, MissingMandatoryValue) as exc:  # wrong type, missing value
        key = str(exc.full_key or exc.key or "?")
        if "." not in key and key not in _known_keys(""):
            # omegaconf names only the field inside a list of records: find its full path
            key = next(iter(_paths_ending(data, key, getattr(exc, "value", None))), key)
        msg = str(exc).splitlines()[0]
        raise ConfigError(key, getattr(exc, "value", None),
                          f"is not accepted: {plain_type(msg)}") from None
    validate(sc)
    if not sc.telescope.psf.cache_dir:
        sc.telescope.psf.cache_dir = str(default_cache_dir() / "psf")
    return sc


def default_cache_dir() -> Path:
    """The per-user cache folder: ``$XDG_CACHE_HOME/simfield``, else ``~/.cache/simfield``."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "simfield"


@functools.lru_cache(maxsize=None)
def _type_hints(cls) -> dict:
    """``typing.get_type_hints`` of schema dataclass ``cls``, evaluated once (the annotations
    are strings, ``from __future__ import annotations``; evaluating them anew for every key
    cost ~1 s per scenario). Read it, do not change it."""
    return typing.get_type_hints(cls)


def schema_type(key: str) -> Any:
    """The schema's type of dotted ``key`` (list items by index), or None if it has none."""
    cls: Any = Scenario
    for part in key.split("."):
        origin = typing.get_origin(cls)
        if origin in (list, tuple):
            if not part.isdigit():
                return None
            cls = typing.get_args(cls)[0]
            continue
        if not dataclasses.is_dataclass(cls):
            return None
        cls = _type_hints(cls).get(part)
        if cls is None:
            return None
    return cls


def check_raw_value(key: str, value: Any) -> None:
    """Refuse a value OmegaConf would silently convert: a boolean key given anything but
    true/false (OmegaConf turns 2 or "yes" into True). Raises :class:`ConfigError`."""
    if schema_type(key) is bool:
        require(isinstance(value, bool), key, value, "must be true or false")


def _check_raw_booleans(data: Any, prefix: str = "") -> None:
    items = (data.items() if isinstance(data, dict) else
             enumerate(data) if isinstance(data, list) else ())
    for k, v in items:
        path = f"{prefix}.{k}" if prefix else str(k)
        if isinstance(v, (dict, list)):
            _check_raw_booleans(v, path)
        else:
            check_raw_value(path, v)


def _lookup(data: dict, key: str) -> Any:
    node: Any = data
    for part in key.split("."):
        if isinstance(node, dict) and part in node:
            node = node[part]
        elif isinstance(node, list) and part.isdigit() and int(part) < len(node):
            node = node[int(part)]
        else:
            return None
    return node


def _paths_ending(data: Any, key: str, value: Any, prefix: str = ""):
    """Dotted paths in ``data`` whose last part is ``key`` and whose value is ``value``."""
    items = (data.items() if isinstance(data, dict) else
             enumerate(data) if isinstance(data, list) else ())
    for k, v in items:
        path = f"{prefix}.{k}" if prefix else str(k)
        if str(k) == key and v == value:
            yield path
        yield from _paths_ending(v, key, value, path)


def _known_keys(parent: str) -> list[str]:
    """Field names of the schema node at dotted path ``parent`` ('' for the root)."""
    cls: Any = Scenario
    for part in filter(None, parent.split(".")):
        if part.isdigit():  # list element: the list's item type was resolved already
            continue
        hint = _type_hints(cls).get(part)
        args = typing.get_args(hint)
        cls = args[0] if args else hint
        if not dataclasses.is_dataclass(cls):
            return []
    return [f.name for f in dataclasses.fields(cls)]


def config_hash(sc: Scenario) -> str:
    """Short SHA-256 of the resolved scenario (16 hex digits), recorded in every output."""
    return _hash(_content(sc))


def hash_and_yaml(sc: Scenario) -> tuple[str, str]:
    """(:func:`config_hash`, :func:`to_yaml`) of ``sc`` from one structured copy of it (making
    that copy is most of the cost of each)."""
    node = _content(sc)
    return _hash(node), OmegaConf.to_yaml(node)


def _hash(node: DictConfig) -> str:
    text = OmegaConf.to_yaml(node, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _content(sc: Scenario) -> DictConfig:
    """The scenario without :data:`EXECUTION_ONLY_KEYS` (what a run makes, not how)."""
    node = OmegaConf.structured(sc)
    return OmegaConf.masked_copy(node, [k for k in node if k not in EXECUTION_ONLY_KEYS])


def to_yaml(sc: Scenario) -> str:
    """The resolved scenario as YAML text (without :data:`EXECUTION_ONLY_KEYS`)."""
    return OmegaConf.to_yaml(_content(sc))
