"""The tissue table of the synthetic head model (``demo_cases/tissues.toml``), validated."""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

from sigreport.errors import InputError
from sigreport.lexicon import check_keys

FIELDS_T = (1.5, 3.0)


def demo_dir() -> Path:
    """The bundled ``demo_cases`` folder (shipped as ``sigreport._demo_cases``)."""
    packaged = Path(str(resources.files("sigreport"))) / "_demo_cases"
    if packaged.is_dir():
        return packaged
    # Source tree or an editable install without the mapping: the repository's demo_cases/.
    return Path(__file__).resolve().parent.parent.parent / "demo_cases"


@dataclass(frozen=True)
class Tissue:
    """Relaxation parameters of one tissue at one field strength."""

    name: str
    pd: float
    t1_ms: float
    t2_ms: float
    gd_mmol_l: float = 0.0
    fat: bool = False
    flow_void: bool = False
    adc_1e6_mm2_s: float | None = None  # apparent diffusion coefficient, 10^-6 mm^2/s
    fat_fraction: float = 0.0  # share of the proton density that is fat (1 for adipose tissue)
    r2_prime_per_s: float | None = None  # static dephasing; None: the table's default
    uptake: str = "plateau"  # contrast uptake curve over time (``TissueTable.uptake``)


@dataclass(frozen=True)
class UptakeCurve:
    """Relative agent concentration over time (``physics.uptake_fraction``)."""

    rise_s: float
    washout_s: float | None = None


@dataclass(frozen=True)
class TissueTable:
    """Every tissue at one field strength, plus the agent and fat-saturation constants."""

    field_strength_t: float
    tissues: dict[str, Tissue]
    r1_l_mmol_s: float
    r2_l_mmol_s: float
    agent: str
    fat_sat_residual: float
    fat_sat_failed_residual: float
    r2_prime_per_s: float
    uptake: dict[str, UptakeCurve] = field(default_factory=dict)

    def get(self, name: str) -> Tissue:
        """The tissue called ``name``; raises ``InputError`` naming the known ones."""
        try:
            return self.tissues[name]
        except KeyError:
            known = ", ".join(sorted(self.tissues))
            raise InputError(f'unknown tissue "{name}"; the tissue table has {known}') from None


def _field_key(field_strength_t: float) -> str:
    for f in FIELDS_T:
        if abs(field_strength_t - f) < 1e-6:
            return f"{f:.1f}"
    raise InputError(
        f"field strength {field_strength_t} T is not tabulated; use one of "
        + ", ".join(f"{f:.1f}" for f in FIELDS_T)
    )


def _by_field(entry: dict[str, Any], key: str, fkey: str, where: str) -> float:
    table = entry.get(key)
    if not isinstance(table, dict) or fkey not in table:
        raise InputError(f"{where}: {key} needs a value for {fkey} T")
    value = float(table[fkey])
    if value <= 0:
        raise InputError(f"{where}: {key}[{fkey}] must be > 0, got {value}")
    return value


def load_tissues(field_strength_t: float, path: Path | None = None) -> TissueTable:
    """Read the tissue table at one field strength.

    Parameters
    ----------
    field_strength_t
        1.5 or 3.0.
    path
        A tissues TOML file; default the bundled ``demo_cases/tissues.toml``.
    """
    path = path if path is not None else demo_dir() / "tissues.toml"
    fkey = _field_key(field_strength_t)
    try:
        with Path(path).open("rb") as handle:
            data = tomllib.load(handle)
    except OSError as exc:
        raise InputError(f"tissue table {path}: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"tissue table {path}: not valid TOML: {exc}") from None
    check_keys(data, {"sources", "contrast", "fat_sat", "t2_prime", "uptake", "tissue"}, str(path))
    sources = data.get("sources", {})
    tissues: dict[str, Tissue] = {}
    allowed = {
        "pd", "t1_ms", "t2_ms", "gd_mmol_l", "fat", "flow_void", "source", "note",
        "adc_1e-6_mm2_s", "fat_fraction", "r2_prime_per_s", "uptake",
    }  # fmt: skip
    uptake = _uptake_curves(data.get("uptake", {}), f"{path}: uptake")
    for name, entry in data.get("tissue", {}).items():
        where = f"{path}: tissue.{name}"
        check_keys(entry, allowed, where)
        if entry.get("source") not in sources:
            raise InputError(f"{where}: source {entry.get('source')!r} is not in [sources]")
        pd = float(entry.get("pd", -1))
        gd = float(entry.get("gd_mmol_l", 0.0))
        if pd < 0 or gd < 0:
            raise InputError(f"{where}: pd and gd_mmol_l must be >= 0")
        fat = bool(entry.get("fat", False))
        fat_fraction = float(entry.get("fat_fraction", 1.0 if fat else 0.0))
        if not 0.0 <= fat_fraction <= 1.0:
            raise InputError(f"{where}: fat_fraction must be in [0, 1], got {fat_fraction}")
        adc = entry.get("adc_1e-6_mm2_s")
        if adc is not None and float(adc) < 0:
            raise InputError(f"{where}: adc_1e-6_mm2_s must be >= 0, got {adc}")
        curve = str(entry.get("uptake", "plateau"))
        if uptake and curve not in uptake:
            raise InputError(f"{where}: uptake {curve!r} is not in [uptake] ({', '.join(uptake)})")
        tissues[name] = Tissue(
            name=name,
            pd=pd,
            t1_ms=_by_field(entry, "t1_ms", fkey, where),
            t2_ms=_by_field(entry, "t2_ms", fkey, where),
            gd_mmol_l=gd,
            fat=fat,
            flow_void=bool(entry.get("flow_void", False)),
            adc_1e6_mm2_s=None if adc is None else float(adc),
            fat_fraction=fat_fraction,
            r2_prime_per_s=_by_field(entry, "r2_prime_per_s", fkey, where)
            if "r2_prime_per_s" in entry
            else None,
            uptake=curve,
        )
    contrast = data.get("contrast", {})
    fat_sat = data.get("fat_sat", {})
    prime = data.get("t2_prime", {})
    return TissueTable(
        field_strength_t=float(fkey),
        tissues=tissues,
        r1_l_mmol_s=_by_field(contrast, "r1_l_mmol_s", fkey, f"{path}: contrast"),
        r2_l_mmol_s=_by_field(contrast, "r2_l_mmol_s", fkey, f"{path}: contrast"),
        agent=str(contrast.get("agent", "gadolinium")),
        fat_sat_residual=float(fat_sat.get("residual", 0.05)),
        fat_sat_failed_residual=float(fat_sat.get("failed_residual", 0.8)),
        r2_prime_per_s=_by_field(prime, "r2_prime_per_s", fkey, f"{path}: t2_prime"),
        uptake=uptake,
    )


def _uptake_curves(table: dict[str, Any], where: str) -> dict[str, UptakeCurve]:
    curves: dict[str, UptakeCurve] = {}
    for name, entry in table.items():
        if name in ("source", "note"):
            continue
        check_keys(entry, {"rise_s", "washout_s"}, f"{where}.{name}")
        rise = float(entry.get("rise_s", 0.0))
        washout = entry.get("washout_s")
        if rise <= 0 or (washout is not None and float(washout) <= 0):
            raise InputError(f"{where}.{name}: rise_s and washout_s must be > 0")
        curves[name] = UptakeCurve(rise, None if washout is None else float(washout))
    return curves
