"""The settings of a measurement (one validated recipe), its vocabularies and the exit codes.

Every choice is validated here, against vocabularies defined once beside the code that uses
them (and read by the command line's ``choices`` too), so that a bad recipe is a usage error
with a one-line message, never a failed image.
"""
from __future__ import annotations

import math
import tomllib
from dataclasses import asdict, dataclass, fields
from pathlib import Path

import numpy as np

from edges.io import FRAME_STACKS
from edges.locate import ORIENTATIONS, POLARITIES
from edges.profiles import PROFILE_MODELS

from ..analysis import AnalysisOptions

__all__ = ["MeasureSettings", "SettingsError", "DETECTORS", "EXIT_OK", "EXIT_USAGE", "EXIT_SOME_FAILED"]

#: Exit status of the command line: all done; bad usage (nothing measured); some images failed.
EXIT_OK, EXIT_USAGE, EXIT_SOME_FAILED = 0, 2, 3

#: Per-row edge detectors: the profile-model fit (calibrated uncertainties) and two baselines.
DETECTORS = ("model", "threshold", "slope")


class SettingsError(ValueError):
    """A setting with a wrong value or type; the message names it and what is allowed."""


#: Pixel sizes accepted (nm): a top-down SEM image of line/space patterns has pixels of
#: about 0.1-20 nm; a generous range still catches a value given in the wrong unit.
PIXEL_SIZE_RANGE_NM = (0.01, 1000.0)


@dataclass(frozen=True)
class MeasureSettings:
    """Everything that decides a measurement (written to settings.json).

    Attributes
    ----------
    pixel_size_nm : float or None
        Pixel size in nm; None takes it from each file's TIFF resolution tags.
    detector : {"model", "threshold", "slope"}
        Per-row edge detector; "model" is the profile fit with calibrated uncertainties.
    profile_model : {"template", "parametric", "step"}
        Profile model of the "model" detector.
    window_px : int
        Fit window across each edge (odd, >= 9).
    polarity : {"auto", "bright", "dark"}
    orientation : {"auto", "vertical", "horizontal"}
    threshold_level : float
        Level of the threshold detector (fraction of the local plateau-to-plateau range).
    detrend, psd_window, max_gap_rows, max_invalid_fraction, n_resamples, confidence, model_resamples, seed :
        See :class:`roughness.analysis.AnalysisOptions`.
    calibrated_cnr, noise_share_target, precision_target : float
        Policy of the analysis (see :class:`roughness.analysis.AnalysisOptions`).
    report_image_sections : int
        Images that get their own section with figures in the report (the first ones).
    frames : int
        Frames averaged into each image as acquired (see :class:`roughness.analysis.AnalysisOptions`).
    crop_px : (top, bottom, left, right) or None
        Pixels cut from each side of every image before anything else (a region of interest:
        a label, a damaged corner, a second pattern); None keeps the whole image.
    frame_stack : {"refuse", "average"}
        A multi-frame TIFF: refused with the reason, or its frames averaged (already aligned).
    """

    pixel_size_nm: float | None = None
    detector: str = "model"
    profile_model: str = "template"
    window_px: int = 31
    polarity: str = "auto"
    orientation: str = "auto"
    threshold_level: float = 0.5
    detrend: str = "linear"
    psd_window: str = "hann"
    max_gap_rows: int = 8
    max_invalid_fraction: float = 0.05
    n_resamples: int = 1000
    confidence: float = 0.95
    model_resamples: int = 50
    seed: int = 0
    calibrated_cnr: float = 5.0
    noise_share_target: float = 0.10
    precision_target: float = 0.05
    report_image_sections: int = 12
    frames: int = 1
    crop_px: tuple | None = None
    frame_stack: str = "refuse"

    def __post_init__(self):
        def choice(name, allowed):
            value = getattr(self, name)
            if not isinstance(value, str) or value not in allowed:
                raise SettingsError(f"{name}={value!r}: must be one of {', '.join(map(repr, allowed))}")

        choice("detector", DETECTORS)
        choice("profile_model", PROFILE_MODELS)
        choice("polarity", POLARITIES)
        choice("orientation", ORIENTATIONS)
        choice("frame_stack", FRAME_STACKS)
        px = self.pixel_size_nm
        if px is not None and (isinstance(px, bool) or not isinstance(px, (int, float, np.number))
                               or not math.isfinite(px) or not px > 0):
            raise SettingsError(f"pixel_size_nm={px!r}: must be a positive number of nm (or None: from the file)")
        if px is not None and not PIXEL_SIZE_RANGE_NM[0] <= px <= PIXEL_SIZE_RANGE_NM[1]:
            raise SettingsError(f"pixel_size_nm={px!r}: outside {PIXEL_SIZE_RANGE_NM[0]:g}-{PIXEL_SIZE_RANGE_NM[1]:g} nm, "
                                "the range of SEM micrographs (is it in metres or micrometres?)")
        w = self.window_px
        if isinstance(w, bool) or not isinstance(w, (int, np.integer)) or w % 2 != 1 or w < 9:
            raise SettingsError(f"window_px={w!r}: must be an odd integer >= 9")
        t = self.threshold_level
        if isinstance(t, bool) or not isinstance(t, (int, float, np.number)) or not 0 < t < 1:
            raise SettingsError(f"threshold_level={t!r}: must be a number between 0 and 1")
        c = self.crop_px
        if c is not None:
            if (not isinstance(c, (tuple, list)) or len(c) != 4
                    or any(isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 0 for v in c)):
                raise SettingsError(f"crop_px={c!r}: must be four whole numbers of pixels >= 0 "
                                    "(top, bottom, left, right)")
            object.__setattr__(self, "crop_px", tuple(int(v) for v in c))
        r = self.report_image_sections
        if isinstance(r, bool) or not isinstance(r, (int, np.integer)) or r < 0:
            raise SettingsError(f"report_image_sections={r!r}: must be an integer >= 0")
        try:
            self.analysis
        except ValueError as exc:
            raise SettingsError(str(exc)) from None

    @property
    def analysis(self) -> AnalysisOptions:
        """The options of :func:`roughness.analysis.analyse_image` and ``analyse_group``."""
        names = {f.name for f in fields(AnalysisOptions)}
        return AnalysisOptions(**{k: v for k, v in asdict(self).items() if k in names})

    @classmethod
    def field_names(cls) -> tuple:
        return tuple(f.name for f in fields(cls))

    @classmethod
    def from_toml(cls, path, **overrides) -> "MeasureSettings":
        """A site recipe from a TOML file whose keys are the field names; ``overrides`` win.

        Raises
        ------
        SettingsError
            Unreadable file, unknown keys or bad values, in one line naming the file.

        Examples
        --------
        >>> import tempfile, pathlib
        >>> path = pathlib.Path(tempfile.mkdtemp()) / "site.toml"
        >>> _ = path.write_text('detector = "threshold"\\nwindow_px = 25\\n')
        >>> MeasureSettings.from_toml(path).window_px
        25
        """
        path = Path(path)
        try:
            given = tomllib.loads(path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
            raise SettingsError(f"{path}: cannot read the settings file ({exc})") from None
        unknown = sorted(set(given) - set(cls.field_names()))
        if unknown:
            raise SettingsError(f"{path}: unknown settings {unknown}; allowed: {sorted(cls.field_names())}")
        given.update(overrides)
        try:
            return cls(**given)
        except SettingsError as exc:
            raise SettingsError(f"{path}: {exc}") from None
