"""Analysis configuration: defaults, YAML loading and validation.

In: nothing, a mapping, or a YAML file path. Out: a validated, complete nested
``dict`` (section -> key -> value) that every step reads and ``run.json``
records. This is the only place where option values are checked; steps trust
what they receive.

The documented defaults live in ``configs/default.yaml``; the schema below is
the single source of truth for types and ranges, and a test keeps the two equal.
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import yaml

from .errors import ConfigError

__all__ = ["SCHEMA", "default_config", "load_config", "validate_config", "step_options", "Param"]


@dataclass(frozen=True)
class Param:
    """One configuration value: its default, accepted type and range."""

    default: Any
    kind: type | tuple[type, ...]
    low: float | None = None
    high: float | None = None
    choices: tuple[Any, ...] | None = None
    allow_none: bool = False
    low_open: bool = False  # True: value must be strictly greater than ``low``

    def check(self, name: str, value: Any) -> Any:
        if value is None:
            if self.allow_none:
                return None
            raise ConfigError(f"config key '{name}': expected a value, got null")
        kinds = self.kind if isinstance(self.kind, tuple) else (self.kind,)
        if float in kinds and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if isinstance(value, bool) and bool not in kinds:
            raise ConfigError(f"config key '{name}': expected {_kind_name(kinds)}, got {value!r}")
        if not isinstance(value, kinds):
            raise ConfigError(f"config key '{name}': expected {_kind_name(kinds)}, got {value!r}")
        if self.choices is not None and value not in self.choices:
            raise ConfigError(
                f"config key '{name}': expected one of {', '.join(map(str, self.choices))}, got {value!r}"
            )
        if isinstance(value, float) and not math.isfinite(value):
            raise ConfigError(f"config key '{name}': expected a finite number, got {value!r}")
        if self.low is not None and (value < self.low or (self.low_open and value == self.low)):
            rel = ">" if self.low_open else ">="
            raise ConfigError(f"config key '{name}': expected a value {rel} {self.low}, got {value!r}")
        if self.high is not None and value > self.high:
            raise ConfigError(f"config key '{name}': expected a value <= {self.high}, got {value!r}")
        return value


def _kind_name(kinds: tuple[type, ...]) -> str:
    names = {bool: "true/false", int: "an integer", float: "a number", str: "a string", list: "a list"}
    return " or ".join(names.get(k, k.__name__) for k in kinds)


# Section -> key -> Param. Keep in step with configs/default.yaml (a test checks).
SCHEMA: dict[str, dict[str, Param]] = {
    "input": {
        "threshold": Param(None, float, allow_none=True),
        "max_memory_gb": Param(None, float, low=0.0, low_open=True, allow_none=True),
        "implausible_spacing": Param("warn", str, choices=("warn", "error")),
    },
    "cleaning": {
        "min_object_volume_um3": Param(1000.0, float, low=0.0),
        "min_object_area_um2": Param(100.0, float, low=0.0),
        "keep_elongation": Param(3.0, float, low=0.0),
        "fill_cavities": Param(True, bool),
    },
    "centrelines": {
        "max_anisotropy": Param(1.5, float, low=1.0),
        "resample_spacing_um": Param(None, float, low=0.0, low_open=True, allow_none=True),
    },
    "radii": {
        "half_voxel_correction": Param(True, bool),
        "estimator": Param("wall_fit", str, choices=("wall_fit", "distance_map")),
        "junction_exclusion_radii": Param(1.0, float, low=0.0, high=10.0),
        "statistic": Param("trimmed_mean", str, choices=("median", "mean", "trimmed_mean")),
    },
    "pruning": {
        "spur_radius_factor": Param(1.5, float, low=0.0, high=20.0),
        "min_spur_length_um": Param(2.0, float, low=0.0),
        "junction_merge_radii": Param(1.0, float, low=0.0, high=10.0),
        "wall_loop_radii": Param(2.0, float, low=0.0, high=20.0),
        "spur_protrusion_radii": Param(3.0, float, low=0.0, high=20.0),
        "wall_spike_radii": Param(1.0, float, low=0.0, high=20.0),
        "small_loop_radii": Param(8.0, float, low=0.0, high=100.0),
        "web_loop_radii": Param(20.0, float, low=0.0, high=100.0),
        "border_spur_radii": Param(0.75, float, low=0.0, high=1.0),
        "min_fragment_length_um": Param(10.0, float, low=0.0),
        "max_rounds": Param(20, int, low=1, high=1000),
        "reconnect_gaps": Param(False, bool),
        "max_gap_voxels": Param(3.0, float, low=0.0, low_open=True, high=20.0),
        "max_gap_angle_deg": Param(35.0, float, low=0.0, low_open=True, high=90.0),
    },
    "measures": {
        "smoothing_sigma_um": Param(None, float, low=0.0, allow_none=True),
        "tortuosity_step_um": Param(8.0, float, low=0.0, low_open=True),
        "vessel_window_um": Param(10.0, float, low=0.0, low_open=True),
    },
    # --- levels and flow (pipeline/levels.py, pipeline/flow/) ---
    "levels": {
        # 'auto', 'node:ID', a node id, or a position 'z,y,x' / [z, y, x] in µm.
        "root": Param("auto", (str, int, list)),
        "diameter_order_max_iter": Param(50, int, low=1, high=10000),
    },
    "flow": {
        "enabled": Param(True, bool),
        "viscosity_model": Param("pries1994", str, choices=("constant", "pries1992", "pries1994")),
        "viscosity_mpa_s": Param(3.5, float, low=0.0, low_open=True),
        "haematocrit": Param(0.45, float, low=0.0, high=0.9),
        "plasma_viscosity_mpa_s": Param(1.2, float, low=0.0, low_open=True),
        "inlet_pressure_pa": Param(7999.32, float),
        "outlet_pressure_pa": Param(2666.44, float),
        "inlet_flow_nl_min": Param(None, float, low=0.0, low_open=True, allow_none=True),
        "boundary": Param("estimate", str, choices=("estimate", "pressure")),
        "target_pressure_pa": Param(3999.66, float, low=0.0, low_open=True),
        "target_shear_rate_s": Param(500.0, float, low=0.0, low_open=True),
        "target_shear_rate_by_pressure": Param(False, bool),
        "pressure_weight": Param(0.1, float, low=0.0, low_open=True),
        "estimate_max_iter": Param(100, int, low=1, high=10000),
        "perfused_min_velocity_mm_s": Param(0.01, float, low=0.0),
        "haematocrit_model": Param("phase_separation", str, choices=("phase_separation", "uniform")),
        "ensemble_size": Param(16, int, low=0, high=10000),
        "ensemble_seed": Param(0, int, low=0),
        "radius_uncertainty_floor": Param(0.05, float, low=0.0, high=1.0),
        "target_spread": Param(0.3, float, low=0.0, high=3.0),
        "capillary_max_diameter_um": Param(8.0, float, low=0.0, low_open=True),
        "small_vessel_max_diameter_um": Param(30.0, float, low=0.0, low_open=True),
        "rheology_damping": Param(0.5, float, low=0.0, low_open=True, high=1.0),
        "rheology_rtol": Param(1e-4, float, low=0.0, low_open=True, high=0.1),
        "rheology_max_iter": Param(50, int, low=1, high=10000),
        "blind_ends": Param("open", str, choices=("open", "sealed", "outlet")),
        "blood_density_kg_m3": Param(1055.0, float, low=0.0, low_open=True),
        "solver": Param("auto", str, choices=("auto", "direct", "cg")),
        "cg_threshold_nodes": Param(50000, int, low=0),
        "cg_rtol": Param(1e-10, float, low=0.0, low_open=True, high=1e-3),
        "cg_max_iter": Param(20000, int, low=1),
        "min_valid_diameter_um": Param(3.3, float, low=1.1, low_open=True),
    },
    # --- Murray's-law checks at junctions (pipeline/bifurcations/) ---
    "bifurcations": {
        "enabled": Param(True, bool),
        "murray_min_parent_diameter_um": Param(7.0, float, low=0.0, allow_none=True),
        "ratio_min": Param(0.6667, float, low=0.0, low_open=True, allow_none=True),
        "ratio_max": Param(1.5, float, low=0.0, low_open=True, allow_none=True),
        "exponent_min": Param(2.0, float, low=0.0, allow_none=True),
        "exponent_max": Param(4.0, float, low=0.0, low_open=True, allow_none=True),
        "flag_undefined_exponent": Param(True, bool),
        "angle_deviation_max_deg": Param(30.0, float, low=0.0, high=180.0, allow_none=True),
        "flag_multi": Param(True, bool),
        "significance_z": Param(2.0, float, low=0.0),
        "radius_floor_voxels": Param(0.04, float, low=0.0, high=1.0),
        "angle_sd_deg": Param(6.0, float, low=0.0, high=90.0),
        "low_confidence_uncertain": Param(True, bool),
        "min_radius_points": Param(5, int, low=0),
        "min_length_radii": Param(2.0, float, low=0.0),
        "tangent_fit_radii": Param(3.0, float, low=0.0, low_open=True, high=50.0),
        "tangent_skip_radii": Param(1.0, float, low=0.0, high=50.0),
        "network_bootstrap_resamples": Param(2000, int, low=0),
        "network_bootstrap_seed": Param(0, int, low=0),
    },
}


def default_config() -> dict[str, dict[str, Any]]:
    """Return a fresh nested dict of every default value."""
    return {sec: {k: copy.deepcopy(p.default) for k, p in keys.items()} for sec, keys in SCHEMA.items()}


def validate_config(overrides: Mapping[str, Any] | None) -> dict[str, dict[str, Any]]:
    """Merge ``overrides`` into the defaults and check every value.

    Parameters
    ----------
    overrides : mapping or None
        Nested ``{section: {key: value}}``; missing sections and keys take
        their defaults.

    Returns
    -------
    dict
        The complete effective configuration.

    Raises
    ------
    ConfigError
        On an unknown section or key, or a value of the wrong type or range.

    Examples
    --------
    >>> cfg = validate_config({"pruning": {"spur_radius_factor": 2}})
    >>> cfg["pruning"]["spur_radius_factor"]
    2.0
    """
    cfg = default_config()
    if overrides is None:
        return cfg
    if not isinstance(overrides, Mapping):
        raise ConfigError(f"config: expected a mapping of sections, got {type(overrides).__name__}")
    for sec, values in overrides.items():
        if sec not in SCHEMA:
            raise ConfigError(
                f"config: unknown section '{sec}' (known: {', '.join(SCHEMA)})"
            )
        if values is None:
            continue
        if not isinstance(values, Mapping):
            raise ConfigError(f"config section '{sec}': expected a mapping of keys, got {values!r}")
        for key, value in values.items():
            if key not in SCHEMA[sec]:
                raise ConfigError(
                    f"config: unknown key '{sec}.{key}' (known in '{sec}': {', '.join(SCHEMA[sec])})"
                )
            cfg[sec][key] = SCHEMA[sec][key].check(f"{sec}.{key}", value)
    _check_root_form(cfg["levels"]["root"])
    _check_pairs(cfg)
    return cfg


# Keys that bound one range: the first may not exceed the second (either may
# be None, "no bound").
_ORDERED_PAIRS = (("bifurcations", "ratio_min", "ratio_max"), ("bifurcations", "exponent_min", "exponent_max"))


def step_options(section: str, values: Mapping[str, Any], *, config: Mapping[str, Any] | None = None,
                 caller: str = "") -> dict[str, Any]:
    """A step's keyword options, validated as that section of the config.

    Step functions take their options as keywords with the defaults of
    :data:`SCHEMA` in their signatures (a test checks they agree) and call
    this once at their edge: ``values`` is their ``locals()``, of which the
    section's keys are taken.

    Parameters
    ----------
    section : str
        A key of :data:`SCHEMA`.
    values : mapping
        The step's keyword arguments (other names are ignored).
    config : mapping, optional, keyword-only
        The earlier way to give them: a full config or the section. Options
        given as keywords (not at their defaults) win. Deprecated: a
        DeprecationWarning names the keywords to use.
    caller : str, keyword-only
        The step's name, for the warning.

    Returns
    -------
    dict
        The whole section, validated (cross-key rules included).

    Raises
    ------
    ConfigError
    """
    schema = SCHEMA[section]
    given = {k: values[k] for k in schema if k in values and values[k] is not schema[k].default
             and values[k] != schema[k].default}
    if config is not None:
        import warnings

        warnings.warn(f"{caller or 'this step'}(config=...) is deprecated: pass the options of the '{section}' "
                      f"section as keywords, e.g. {caller or 'step'}(..., **config['{section}'])",
                      DeprecationWarning, stacklevel=3)
        old = config.get(section, config) if isinstance(config, Mapping) else config
        if not isinstance(old, Mapping):
            raise ConfigError(f"{section} config: expected a mapping, got {type(old).__name__}")
        if section not in config and set(config) & set(SCHEMA):
            old = {}  # a full config from before this section existed
        given = {**{k: v for k, v in old.items()}, **given}
    return validate_config({section: given})[section]


def _check_pairs(cfg: dict[str, dict[str, Any]]) -> None:
    """Rules that tie two keys, checked with the rest so a bad file fails before any work."""
    for sec, lo, hi in _ORDERED_PAIRS:
        a, b = cfg[sec][lo], cfg[sec][hi]
        if a is not None and b is not None and a > b:
            raise ConfigError(f"config keys '{sec}.{lo}' and '{sec}.{hi}': expected {lo} <= {hi}, got {a!r} > {b!r}")


def _check_root_form(root: Any) -> None:
    """levels.root must read as 'auto', a node id or a position (its node is found later)."""
    expected = "expected 'auto', 'node:ID', a node id or a position 'z,y,x' in µm"
    if isinstance(root, bool):
        raise ConfigError(f"levels.root: {expected}, got {root!r}")
    if isinstance(root, int):
        return
    if isinstance(root, str):
        text = root.strip().lower()
        if text == "auto":
            return
        if text.startswith("node:"):
            if text[5:].strip().isdigit():
                return
            raise ConfigError(f"levels.root: {expected}, got {root!r}")
        parts = text.split(",")
    else:
        parts = list(root)
    try:
        ok = len(parts) == 3 and all(math.isfinite(float(v)) for v in parts)
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise ConfigError(f"levels.root: {expected}, got {root!r}")


def load_config(source: str | Path | Mapping[str, Any] | None = None) -> dict[str, dict[str, Any]]:
    """Load and validate a configuration from a YAML file, a mapping or nothing.

    Raises
    ------
    ConfigError
        When the file is missing, is not valid YAML, or fails validation.
    """
    if source is None or isinstance(source, Mapping):
        return validate_config(source)
    path = Path(source)
    if not path.is_file():
        raise ConfigError(f"config file '{path}': not found")
    try:
        data = yaml.safe_load(path.read_text(encoding="utf-8"))
    except yaml.YAMLError as exc:
        line = getattr(getattr(exc, "problem_mark", None), "line", None)
        where = f" at line {line + 1}" if line is not None else ""
        raise ConfigError(f"config file '{path}': not valid YAML{where}") from None
    if data is None:
        data = {}
    return validate_config(data)
