"""Read a crystal structure from a CIF file (gemmi does the parsing and the symmetry).

What this stage does: parse CIF 1.1 / CIF 2.0 with gemmi, resolve the space group in the
setting and origin choice the file uses, expand the asymmetric unit to the full unit cell,
and check the result (cell, elements, occupancies, displacement parameters, overlapping
atoms). What it does not do: structure factors (``ringid.library``).

Space-group resolution order: the symmetry-operator loop
(``_space_group_symop_operation_xyz`` / ``_symmetry_equiv_pos_as_xyz``), then the Hall
symbol, then the Hermann–Mauguin symbol (``_space_group_name_H-M_alt``,
``_symmetry_space_group_name_H-M``, ``_space_group_name_H-M_ref``, ``_space_group_name_H-M_full``;
a full symbol is shortened), then the IT number; each tag also in its DDLm/mmCIF spelling
(``_space_group.name_H-M_alt``, ``_symmetry.Int_Tables_number``, ...). When an H-M symbol names
a group with two origin choices and does not say which, both are tried and the one that puts no
two atoms on top of each other is used (origin choice 2 when both are clean), with a warning;
an R symbol without :H or :R takes the axes the cell angles show.

Type symbols: an element with an optional charge (``O2-``, ``Fe3+``; scattered as the neutral
atom, with a warning), or a site shared by several elements written in one row as fractions of
the site (``0.8Nb + 0.2Zr``, ``0.56(4)Mg + 0.29(3)Ta + 0.15(5)Zr``): each element then gets
occupancy fraction × ``_atom_site_occupancy`` on that position. Anything else is refused.

Displacement parameters: U_iso, B_iso (B = 8π²U) or anisotropic U (U_eq is used). A site
without any gets ``DEFAULT_U_ISO_ANGSTROM2`` and the phase records a warning.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ringid.core.errors import RingidError

#: Default isotropic displacement parameter U (Å²) for sites whose CIF gives none:
#: 0.0063 Å² is B = 0.5 Å², a typical room-temperature value for metals and simple oxides
#: (common practice; room-temperature B is about 0.6 Au, 0.8 Al, 0.46 Si Å², from memory).
DEFAULT_U_ISO_ANGSTROM2 = 0.0063

#: Two different sites closer than this (Å) must share the position as alternatives
#: (occupancies summing to at most 1); otherwise the structure is refused.
MIN_SITE_SEPARATION_ANGSTROM = 0.5

#: Symmetry images of one site closer than this (Å) are the same atom (special positions
#: written with rounded coordinates such as 0.3333).
SAME_ATOM_TOLERANCE_ANGSTROM = 0.05

# Symmetry tags, each in the order tried: the CIF 1.1 core name, its DDLm spelling with a dot,
# the older core name it replaced and that one's mmCIF spelling (cif_core.dic, cif_sym.dic and
# mmcif_std.dic; from memory). For H-M: _alt (any setting) before _ref (the reference setting)
# and _full (the full symbol, converted to the short one gemmi knows).
_HM_TAGS = (
    "_space_group_name_H-M_alt", "_space_group.name_H-M_alt",
    "_symmetry_space_group_name_H-M", "_symmetry.space_group_name_H-M",
    "_space_group_name_H-M_ref", "_space_group.name_H-M_ref",
    "_space_group_name_H-M_full", "_space_group.name_H-M_full",
)
_HALL_TAGS = (
    "_space_group_name_Hall", "_space_group.name_Hall",
    "_symmetry_space_group_name_Hall", "_symmetry.space_group_name_Hall",
)
_NUMBER_TAGS = (
    "_space_group_IT_number", "_space_group.IT_number",
    "_symmetry_Int_Tables_number", "_symmetry.Int_Tables_number",
)
_SYMOP_TAGS = (
    "_space_group_symop_operation_xyz", "_space_group_symop.operation_xyz",
    "_symmetry_equiv_pos_as_xyz", "_symmetry_equiv.pos_as_xyz",
)
_TITLE_TAGS = (
    "_chemical_name_common",
    "_chemical_name_mineral",
    "_chemical_name_systematic",
    "_publ_section_title",
)


@dataclass(frozen=True)
class Crystal:
    """A crystal structure expanded to its full unit cell.

    Attributes
    ----------
    phase : str
        Phase id (the CIF file's stem).
    cell : tuple of float
        a, b, c (Å), alpha, beta, gamma (degrees).
    fract : ndarray, shape (n_atoms, 3)
        Fractional coordinates of every atom in the unit cell, in [0, 1).
    elements : tuple of str
        Element symbol per atom (neutral atom; ionic charges are dropped, see warnings).
    occupancy : ndarray, shape (n_atoms,)
    u_iso_angstrom2 : ndarray, shape (n_atoms,)
        Isotropic displacement parameter U (Å²), U_eq for anisotropic sites.
    space_group_number, space_group_symbol, space_group_hall : int, str, str
    crystal_system : str
    operations : tuple of str
        The symmetry operators (x,y,z triplets) used, including centring.
    centring_vectors : tuple of tuple of float
        Lattice-centring translations (fractions), (0, 0, 0) included.
    """

    phase: str
    path: str
    sha256: str
    title: str
    formula: str
    formula_units_z: float
    cell: tuple[float, float, float, float, float, float]
    fract: np.ndarray
    elements: tuple[str, ...]
    occupancy: np.ndarray
    u_iso_angstrom2: np.ndarray
    labels: tuple[str, ...]
    space_group_number: int
    space_group_symbol: str
    space_group_hall: str
    crystal_system: str
    operations: tuple[str, ...]
    centring_vectors: tuple[tuple[float, float, float], ...]
    warnings: tuple[str, ...] = field(default_factory=tuple)

    @property
    def volume_angstrom3(self) -> float:
        return unit_cell(self.cell).volume

    @property
    def density_g_cm3(self) -> float:
        """Density from the cell contents and the cell volume (g/cm³)."""
        import gemmi

        mass_g_mol = float(sum(o * gemmi.Element(e).weight for e, o in zip(self.elements, self.occupancy)))
        avogadro = 6.02214076e23  # exact (SI 2019)
        return mass_g_mol / avogadro / (self.volume_angstrom3 * 1e-24)

    @property
    def is_hexagonal_axes(self) -> bool:
        """True for a cell with a = b and γ = 120° (hexagonal or trigonal on hexagonal axes)."""
        a, b, _, al, be, ga = self.cell
        return abs(a - b) < 1e-6 * a and abs(ga - 120) < 1e-3 and abs(al - 90) < 1e-3 and abs(be - 90) < 1e-3


def unit_cell(cell):
    import gemmi

    return gemmi.UnitCell(*cell)


def sha256_file(path: str | os.PathLike) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def read_crystal(path: str | os.PathLike) -> Crystal:
    """Read a CIF file and expand it to the full unit cell.

    Raises
    ------
    RingidError
        With a one-line reason naming the file, for anything that is not a usable
        inorganic crystal structure.
    """
    import gemmi

    path = Path(path)
    raw, doc = _read_document(path)
    warnings: list[str] = []
    blocks = [b for b in doc if b.find_value("_cell_length_a") is not None]
    if not len(doc):
        raise RingidError(path, "not a CIF file (no data block)")
    if not blocks:
        raise RingidError(path, "no unit cell (_cell_length_a, _cell_length_b, ... are missing)")
    structural = [b for b in blocks if b.find_values("_atom_site_fract_x")]
    if not structural:
        raise RingidError(path, "no atom sites (no _atom_site_fract_x loop)")
    block = structural[0]
    if len(structural) > 1:
        warnings.append(f"file has {len(structural)} structure data blocks; used the first, data_{block.name}")

    cell = _read_cell(path, block)
    small = gemmi.make_small_structure_from_block(block)
    small.cell = gemmi.UnitCell(*cell)
    if not len(small.sites):
        raise RingidError(path, "no atom sites could be read")

    sites = _read_sites(path, block, small, warnings)
    sg, ops = _resolve_space_group(path, block, small, sites, warnings)
    fract, elements, occ, u, labels = _expand(path, small.cell, sites, ops)

    centring = tuple(tuple(float(t) / gemmi.Op.DEN for t in c) for c in ops.cen_ops)
    triplets = tuple(op.triplet() for op in ops)
    if sg is not None:
        number, symbol, hall = sg.number, sg.xhm(), sg.hall
        system = sg.crystal_system_str()
    else:
        number, symbol, hall = 0, f"non-standard setting ({len(triplets)} operators)", ""
        system = _system_from_cell(cell)

    formula, z = _formula_and_z(block, elements, occ)
    title = _title(block, path.stem)
    return Crystal(
        phase=path.stem,
        path=str(path),
        sha256=hashlib.sha256(raw).hexdigest(),
        title=title,
        formula=formula,
        formula_units_z=z,
        cell=cell,
        fract=fract,
        elements=elements,
        occupancy=occ,
        u_iso_angstrom2=u,
        labels=labels,
        space_group_number=int(number),
        space_group_symbol=symbol,
        space_group_hall=hall,
        crystal_system=system,
        operations=triplets,
        centring_vectors=centring,
        warnings=tuple(warnings),
    )


def _read_document(path: Path):
    """The file's bytes and its gemmi CIF document; unreadable, empty, binary or invalid raise RingidError."""
    import gemmi

    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise RingidError(path, f"cannot read file ({exc.strerror or exc})") from None
    if not raw.strip():
        raise RingidError(path, "empty file")
    if b"\x00" in raw:
        raise RingidError(path, "not a CIF file (binary data)")
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError:
        try:
            raw.decode("latin-1")
        except UnicodeDecodeError:  # pragma: no cover - latin-1 decodes any bytes
            raise RingidError(path, "not a CIF file (not text)") from None
    try:
        return raw, gemmi.cif.read_string(raw)
    except (RuntimeError, ValueError) as exc:
        raise RingidError(path, f"not a valid CIF: {_first_line(exc)}") from None


def _first_line(exc: Exception) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _number(block, tag: str) -> float | None:
    """A CIF numeric value without its standard uncertainty, or None when absent/unknown."""
    import gemmi

    value = block.find_value(tag)
    if value is None:
        return None
    number = gemmi.cif.as_number(value)  # strips a standard uncertainty, NaN for ? . or text
    return None if math.isnan(number) else float(number)


def _read_cell(path, block) -> tuple[float, float, float, float, float, float]:
    names = (
        "_cell_length_a",
        "_cell_length_b",
        "_cell_length_c",
        "_cell_angle_alpha",
        "_cell_angle_beta",
        "_cell_angle_gamma",
    )
    values = []
    for tag in names:
        v = _number(block, tag)
        if v is None and "angle" in tag:
            v = 90.0  # CIF dictionary default for a missing angle
        if v is None:
            raise RingidError(path, f"no unit cell ({tag} is missing or not a number)")
        values.append(float(v))
    a, b, c, al, be, ga = values
    if min(a, b, c) <= 0:
        raise RingidError(path, f"impossible cell lengths a={a}, b={b}, c={c} Å")
    if min(al, be, ga) <= 0 or max(al, be, ga) >= 180:
        raise RingidError(path, f"impossible cell angles alpha={al}, beta={be}, gamma={ga} degrees")
    ca, cb, cg = (math.cos(math.radians(x)) for x in (al, be, ga))
    det = 1 - ca * ca - cb * cb - cg * cg + 2 * ca * cb * cg
    if det <= 1e-10:
        raise RingidError(path, f"impossible cell angles alpha={al}, beta={be}, gamma={ga} degrees (no cell has them)")
    return (a, b, c, al, be, ga)


@dataclass
class _Site:
    label: str
    element: str
    fract: np.ndarray
    occ: float
    u: float
    row: int  # the CIF atom-site row; the components of a mixed site share it


#: One term of a mixed-site type symbol: a fraction (its standard uncertainty in parentheses
#: ignored), an element symbol and an optional charge, as in ``0.56(4)Mg`` or ``0.5Fe2+``.
_MIXED_TERM = r"(\d+(?:\.\d*)?|\.\d+)(?:\(\d+\))?\s*([A-Z][a-z]?)(\d*[+-])?"
_MIXED_RE = re.compile(rf"\s*{_MIXED_TERM}(?:\s*\+\s*{_MIXED_TERM})*\s*")


def _mixed_composition(path, symbol: str, label: str):
    """The (element, fraction, charged) terms of a type symbol such as ``0.8Nb + 0.2Zr``; None if not that form.

    Some databases write a site shared by several elements as one atom-site row whose type
    symbol lists each element with its fraction of the site; the site's occupancy multiplies
    every fraction. The fractions may sum to a little more than 1 by their rounding (half a
    unit of the last digit written, per term); more is refused.
    """
    import gemmi

    if not _MIXED_RE.fullmatch(symbol):
        return None
    terms = re.findall(_MIXED_TERM, symbol)
    rounding = sum(0.5 * 10.0 ** -len(f.partition(".")[2]) for f, _, _ in terms)
    total = sum(float(f) for f, _, _ in terms)
    if total > 1.0 + rounding + 1e-9:
        raise RingidError(path, f"the fractions in type symbol {symbol!r} at site {label} sum to {total:g} > 1")
    if min(float(f) for f, _, _ in terms) <= 0:
        raise RingidError(path, f"type symbol {symbol!r} at site {label} has a zero fraction")
    merged: dict[str, list] = {}  # one scatterer per element (Fe2+ and Fe3+ are both neutral Fe here)
    for fraction, element, charge in terms:
        if gemmi.Element(element).atomic_number == 0:
            raise RingidError(path, f"unknown element symbol {element!r} in type symbol {symbol!r} at site {label}")
        entry = merged.setdefault(gemmi.Element(element).name, [0.0, False])
        entry[0] += float(fraction)
        entry[1] = entry[1] or bool(charge)
    return [(element, fraction, charged) for element, (fraction, charged) in merged.items()]


def _read_sites(path, block, small, warnings) -> list[_Site]:
    """Check every asymmetric-unit site and fix its scattering element(s) and U.

    A mixed-site type symbol (``0.8Nb + 0.2Zr``) becomes one ``_Site`` per element on the
    same position, each with occupancy fraction × ``_atom_site_occupancy``.
    """
    import gemmi

    sites = []
    ionic, defaulted, vacant = [], [], []
    coordinates = _fractional_coordinates(path, block, small, warnings)
    for row, s in enumerate(small.sites):
        label = s.label or "?"
        symbol = s.type_symbol or label
        composition = _site_composition(path, s, label)
        xyz = coordinates[row]
        occ = float(s.occ)
        if not math.isfinite(occ) or occ <= 0:
            raise RingidError(path, f"occupancy {s.occ} at site {label} is not positive")
        if occ > 1.0 + 1e-3:
            raise RingidError(path, f"occupancy {occ:g} > 1 at site {label}")
        if any(charged for _, _, charged in composition):
            ionic.append(f"{label} ({symbol})")
        if s.aniso.nonzero():
            u = float(small.cell.calculate_u_eq(gemmi.SMat33d(*s.aniso.elements_pdb())))
            eig = s.aniso.calculate_eigenvalues()
            if min(eig) < 0:
                raise RingidError(path, f"anisotropic displacement of site {label} is not positive definite")
        else:
            u = float(s.u_iso)
        if not math.isfinite(u) or u < 0:
            raise RingidError(path, f"negative displacement parameter U={u:g} Å² at site {label}")
        if u == 0:
            defaulted.append(label)
            u = DEFAULT_U_ISO_ANGSTROM2
        total = sum(f for _, f, _ in composition)
        if total < 1.0 - 1e-6:
            vacant.append(f"{label} ({symbol}: {total:g})")
        scale = 1.0 / total if total > 1.0 else 1.0  # a sum above 1 by rounding only (checked when parsed)
        for element, fraction, _ in composition:
            sites.append(_Site(label, element, xyz, min(occ, 1.0) * fraction * scale, u, row))
    labels = [s.label or "?" for s in small.sites]
    dup = sorted({x for x in labels if labels.count(x) > 1})
    if dup:
        raise RingidError(path, f"duplicated atom site label(s) {', '.join(dup)}")
    if ionic:
        warnings.append(
            "ionic type symbols scattered as neutral atoms (ITC C Table 4.3.2.2 is for neutral atoms): "
            + ", ".join(ionic)
        )
    if vacant:
        warnings.append(
            "mixed-site fractions summing to less than 1, the rest of the site taken as vacant: " + ", ".join(vacant)
        )
    if defaulted:
        warnings.append(
            f"no displacement parameter for site(s) {', '.join(defaulted)}; used the default "
            f"U = {DEFAULT_U_ISO_ANGSTROM2} Å² (B = {8 * math.pi**2 * DEFAULT_U_ISO_ANGSTROM2:.2f} Å²)"
        )
    return sites


def _fractional_coordinates(path, block, small, warnings) -> list[np.ndarray]:
    """Fractional coordinates of every atom-site row, with ``.`` read as 0 where that is defensible.

    In CIF a lone ``?`` marks a value as unknown and a lone ``.`` as inapplicable or as the
    dictionary's default (the CIF 1.1 syntax specification, IUCr 2003; International Tables for
    Crystallography Vol. G (2005), Chap. 2.2; from memory). A coordinate is never
    inapplicable and the core dictionary gives ``_atom_site_fract_x``/``_y``/``_z`` no default
    (from memory), so ``.`` has no value of its own there; some exports write it for a zero
    coordinate. It is read as 0 only when the file writes no zero coordinate as a number (so
    ``.`` is the file's way of writing zero), with a warning naming the sites; if the file also
    writes numeric zeros, ``.`` means something else and the file is refused. ``?`` and
    non-numeric text are refused.
    """
    raw_columns = [block.find_values(f"_atom_site_fract_{axis}") for axis in "xyz"]
    aligned = all(len(col) == len(small.sites) for col in raw_columns)
    coordinates, dotted, zero_label = [], [], None
    for row, s in enumerate(small.sites):
        label = s.label or "?"
        xyz = np.array([s.fract.x, s.fract.y, s.fract.z], dtype=float)
        if zero_label is None and np.any(xyz == 0):
            zero_label = label
        missing = [k for k in range(3) if not math.isfinite(xyz[k])]
        if missing and not aligned:
            raise RingidError(path, f"site {label} has no numeric fractional coordinates")
        for k in missing:
            raw, name = raw_columns[k][row], f"_atom_site_fract_{'xyz'[k]}"
            if raw == "?":
                raise RingidError(path, f"site {label} has an unknown fractional coordinate ({name} is '?')")
            if raw != ".":
                raise RingidError(path, f"site {label} has a fractional coordinate that is not a number ({name} {raw})")
            dotted.append((label, "xyz"[k]))
            xyz[k] = 0.0
        coordinates.append(xyz)
    if dotted and zero_label is not None:
        label, axis = dotted[0]
        raise RingidError(
            path,
            f"site {label} has '.' for _atom_site_fract_{axis} (no value: CIF's inapplicable/default mark, and "
            f"coordinates have no default), while this file writes zero coordinates as numbers (site {zero_label})",
        )
    if dotted:
        by_site: dict[str, str] = {}
        for label, axis in dotted:
            by_site[label] = by_site.get(label, "") + axis
        warnings.append(
            "fractional coordinates written '.' read as 0 (the file writes no zero coordinate as a number): "
            + ", ".join(f"{label} ({' '.join(axes)})" for label, axes in by_site.items())
        )
    return coordinates


#: An ordinary type symbol: an element, then an optional charge (``O2-``, ``Fe3+``, ``Nb+5``) or
#: serial number (``O1``).
_ORDINARY_RE = re.compile(r"\s*([A-Za-z]{1,2})\s*(\d*[+-]|[+-]\d+|\d*)\s*")


def _site_composition(path, site, label: str) -> list[tuple[str, float, bool]]:
    """(element, fraction of the site, charged) for one atom-site row; raises RingidError.

    Without ``_atom_site_type_symbol`` the element comes from the label (gemmi's rule). A type
    symbol must be an element with an optional charge, or a mixed site such as
    ``0.8Nb + 0.2Zr``; anything else (``Nb + Zr``, ``Nb0.8Zr0.2``, ``Fe2+/Fe3+``) is refused
    rather than read as its first element.
    """
    import gemmi

    symbol = site.type_symbol
    if not symbol:
        if site.element.atomic_number == 0:
            raise RingidError(path, f"unknown element symbol {label!r} at site {label}")
        composition = [(site.element.name, 1.0, bool(site.charge))]
    elif (ordinary := _ORDINARY_RE.fullmatch(symbol)) is not None:
        if site.element.atomic_number == 0 or ordinary.group(1).lower() != site.element.name.lower():
            raise RingidError(path, f"unknown element symbol {symbol!r} at site {label}")
        charge = ordinary.group(2)
        composition = [(site.element.name, 1.0, bool(charge) and not charge.isdigit())]
    else:
        composition = _mixed_composition(path, symbol, label)
        if composition is None:
            raise RingidError(
                path,
                f"cannot read type symbol {symbol!r} at site {label} (expected an element with an optional charge "
                "such as 'Fe3+', or fractions of elements such as '0.8Nb + 0.2Zr')",
            )
    for element, _, _ in composition:
        if gemmi.Element(element).atomic_number > 98:
            raise RingidError(
                path, f"element {element} at site {label} has no tabulated electron scattering factor (Z > 98)"
            )
    return composition


def _resolve_space_group(path, block, small, sites, warnings):
    """Return (SpaceGroup or None, GroupOps) in the file's own setting."""
    import gemmi

    symops = []
    for tag in _SYMOP_TAGS:
        col = block.find_values(tag)
        if col:
            symops = [gemmi.cif.as_string(v) for v in col]
            break
    hall = next(
        (gemmi.cif.as_string(block.find_value(t)) for t in _HALL_TAGS if block.find_value(t) not in (None, "?", ".")),
        "",
    )
    hm_given = [gemmi_string(block.find_value(t)) or "" for t in _HM_TAGS]
    hm_given = [h for h in hm_given if h.strip()]
    # the first H-M symbol gemmi can resolve (a later tag may hold a form an earlier one lacks)
    resolved = [(h, _hm_candidates(h, small.cell)) for h in hm_given]
    hm, candidates = next(((h, c) for h, c in resolved if c), (hm_given[0] if hm_given else "", []))
    if len({c[0].number for _, c in resolved if c}) > 1:
        warnings.append(f"the H-M symbols {', '.join(map(repr, hm_given))} name different space groups; used {hm!r}")
    number = next((_number(block, t) for t in _NUMBER_TAGS if _number(block, t) is not None), None)

    if symops:
        try:
            listed = [gemmi.Op(t) for t in symops]
        except (RuntimeError, ValueError) as exc:
            raise RingidError(path, f"cannot read the symmetry operators: {_first_line(exc)}") from None
        ops, n_listed = _close_group(path, listed)
        sg = gemmi.find_spacegroup_by_ops(ops)
        if len(ops) != n_listed:
            listed_text = "1 distinct symmetry operator listed is" if n_listed == 1 else \
                f"{n_listed} distinct symmetry operators listed are"
            warnings.append(
                f"the {listed_text} not a group; completed to the {len(ops)} operators they generate "
                f"({sg.xhm() if sg is not None else 'a non-standard setting'})"
            )
        if candidates and sg is not None:
            named = candidates[0]
            if named.number != sg.number:
                warnings.append(
                    f"H-M symbol {hm!r} disagrees with the symmetry operators ({sg.xhm()}); used the operators"
                )
        return sg, ops
    if hall:
        try:
            ops = gemmi.symops_from_hall(hall)
        except (RuntimeError, ValueError):
            raise RingidError(path, f"the space group cannot be resolved: unknown Hall symbol {hall!r}") from None
        return gemmi.find_spacegroup_by_ops(ops), ops
    if hm:
        if not candidates:
            raise RingidError(
                path, f"the space group cannot be resolved: unknown H-M symbol {hm!r} and no symmetry operators"
            )
        if len(candidates) == 1:
            return candidates[0], candidates[0].operations()
        # two origin choices and the file does not say which
        chosen, why = _choose_origin(block, small.cell, sites, candidates)
        warnings.append(f"H-M symbol {hm!r} does not state the origin choice; used {chosen.xhm()} ({why})")
        return chosen, chosen.operations()
    if number is not None:
        sg = gemmi.find_spacegroup_by_number(int(number))
        if sg is None:
            raise RingidError(path, f"the space group cannot be resolved: IT number {number} is not 1-230")
        warnings.append(f"space group only given by its number {int(number)}; assumed the reference setting {sg.xhm()}")
        return sg, sg.operations()
    raise RingidError(
        path, "the space group cannot be resolved: no symmetry operators, Hall symbol, H-M symbol or number"
    )


def _hm_candidates(hm: str, cell):
    """Space groups an H-M symbol may mean: one, or both origin choices when it does not say which.

    The cell angles pick rhombohedral or hexagonal axes for an R symbol that does not say (gemmi).
    """
    import gemmi

    angles = (cell.alpha, cell.gamma)
    sg = gemmi.find_spacegroup_by_name(hm, *angles)
    if sg is None:
        hm = _short_hm(hm)
        sg = gemmi.find_spacegroup_by_name(hm, *angles)
    if sg is None:
        return []
    if ":" in hm or not sg.ext or sg.ext not in "12":
        return [sg]
    base = hm.strip()
    out = []
    for choice in ("1", "2"):
        alt = gemmi.find_spacegroup_by_name(f"{base}:{choice}", *angles)
        if alt is not None:
            out.append(alt)
    return out or [sg]


def _short_hm(symbol: str) -> str:
    """The short H-M symbol of a full one: 'P 21/n 21/m 21/a' → 'P n m a', 'F 4/m -3 2/m' → 'F m -3 m'.

    Rules of the short symbols (International Tables for Crystallography Vol. A, Sect. 4.1;
    from memory): a position written rotation/plane keeps only the plane, except the principal
    axis of a tetragonal or hexagonal group ('P 42/m 21/n 2/m' → 'P 42/m n m') and the unique
    axis of a monoclinic one ('P 1 21/c 1' stays); cubic groups (second position 3 or -3) keep
    no rotation part ('I 41/a -3 2/d' → 'I a -3 d'). A symbol without '/' is returned as it is.
    """
    head, colon, setting = symbol.partition(":")
    parts = head.split()
    if len(parts) < 2 or "/" not in head:
        return symbol
    lattice, *positions = parts
    cubic = len(positions) > 1 and positions[1] in ("3", "-3")
    monoclinic = sum(p != "1" for p in positions) == 1
    principal = not cubic and positions[0].lstrip("-")[:1] in ("3", "4", "6")
    short = [
        p if "/" not in p or monoclinic or (i == 0 and principal) else p.split("/", 1)[1]
        for i, p in enumerate(positions)
    ]
    return " ".join([lattice, *short]) + colon + setting


def _close_group(path, listed):
    """The group the listed operators generate, and how many distinct operators were listed.

    Completing is right when every listed operator is a symmetry of the structure: products of
    symmetries are symmetries, so the generated group follows from the list itself. Lists that
    are not groups are usually generator-only or cut short (the dictionaries ask for every
    operator of the space group; from memory). An operator that is wrong would generate too
    large a group; the overlap check catches most of those, and the caller warns whenever
    operators were added. Operators equal modulo lattice translations count once; the identity
    is added if missing (gemmi's GroupOps needs it to find the centring vectors).
    """
    import gemmi

    seen, distinct = set(), []
    for op in listed:
        key = op.wrap().triplet()
        if key not in seen:
            seen.add(key)
            distinct.append(op)
    n_listed = len(distinct)
    if gemmi.Op("x,y,z").triplet() not in seen:
        distinct.insert(0, gemmi.Op("x,y,z"))
    ops = gemmi.GroupOps(distinct)
    try:
        ops.add_missing_elements()
    except RuntimeError as exc:
        raise RingidError(path, f"the symmetry operators do not form a space group: {_first_line(exc)}") from None
    return ops, n_listed


def _ops_arrays(ops):
    import gemmi

    rot = np.array([op.rot for op in ops], dtype=float) / gemmi.Op.DEN
    tran = np.array([op.tran for op in ops], dtype=float) / gemmi.Op.DEN
    return rot, tran


def _images(cell, site: _Site, rot, tran):
    """Distinct symmetry images of one site in [0, 1), merged within SAME_ATOM_TOLERANCE."""
    pts = np.einsum("nij,j->ni", rot, site.fract) + tran
    pts = pts - np.floor(pts)
    pts[pts > 1 - 1e-9] = 0.0
    orth = np.array(cell.orth.mat.tolist())
    kept: list[np.ndarray] = []
    for p in pts:
        if not kept:
            kept.append(p)
            continue
        diff = np.asarray(kept) - p
        diff -= np.round(diff)
        if np.min(np.linalg.norm(diff @ orth.T, axis=1)) > SAME_ATOM_TOLERANCE_ANGSTROM:
            kept.append(p)
    return np.asarray(kept)


def _expand(path, cell, sites, ops):
    rot, tran = _ops_arrays(ops)
    fract, elements, occ, u, labels = [], [], [], [], []
    owner = []
    for s in sites:
        imgs = _images(cell, s, rot, tran)
        fract.append(imgs)
        n = len(imgs)
        elements += [s.element] * n
        occ += [s.occ] * n
        u += [s.u] * n
        labels += [s.label] * n
        owner += [s.row] * n
    fract = np.vstack(fract)
    occ = np.asarray(occ)
    row_occ = {s.row: s.occ for s in _one_per_row(sites)}
    _check_overlaps(path, cell, fract, np.array([row_occ[r] for r in owner]), np.asarray(owner),
                    {s.row: s.label for s in sites})
    return fract, tuple(elements), occ, np.asarray(u), tuple(labels)


def _close_pairs(cell, fract, limit):
    """Index pairs (i < j) of atoms closer than ``limit`` Å (minimum image) and their distances.

    Rows in blocks of 256 atoms, so the work arrays stay near 256 × n × 3 numbers.
    """
    orth = np.array(cell.orth.mat.tolist())
    found_i, found_j, found_d = [], [], []
    for start in range(0, len(fract), 256):
        diff = fract[start : start + 256, None, :] - fract[None, :, :]
        diff -= np.round(diff)
        dist = np.linalg.norm(diff @ orth.T, axis=2)
        rows = np.arange(start, start + len(dist))[:, None]
        i, j = np.nonzero((dist < limit) & (np.arange(len(fract))[None, :] > rows))
        found_i.append(i + start)
        found_j.append(j)
        found_d.append(dist[i, j])
    return np.concatenate(found_i), np.concatenate(found_j), np.concatenate(found_d)


def _check_overlaps(path, cell, fract, occ, owner, labels):
    """Refuse atoms of different rows closer than MIN_SITE_SEPARATION whose rows' occupancies sum above 1."""
    if len(fract) > 3000:  # very large cells: skip the O(n²) check rather than stall
        return
    i, j, dist = _close_pairs(cell, fract, MIN_SITE_SEPARATION_ANGSTROM)
    for a, b, d in zip(i, j, dist):
        if owner[a] == owner[b]:
            continue  # images of one site too close together are handled as the same atom above
        if occ[a] + occ[b] > 1.0 + 1e-3:
            la, lb = labels[owner[a]], labels[owner[b]]
            what = "duplicated atom sites" if d < SAME_ATOM_TOLERANCE_ANGSTROM else "atoms too close"
            raise RingidError(
                path,
                f"{what}: {la} and {lb} are {d:.3f} Å apart with total occupancy {occ[a] + occ[b]:g} > 1 "
                "(wrong space group setting or origin choice?)",
            )


def _one_per_row(sites: list[_Site]) -> list[_Site]:
    """One site per CIF atom-site row (a mixed site's components merged), with the row's total occupancy."""
    total: dict[int, float] = {}
    first: dict[int, _Site] = {}
    for s in sites:
        total[s.row] = total.get(s.row, 0.0) + s.occ
        first.setdefault(s.row, s)
    return [dataclasses.replace(s, occ=total[row]) for row, s in first.items()]


def _choose_origin(block, cell, sites, candidates):
    """Pick the origin choice under which the asymmetric unit makes a sensible cell.

    In order: no overlapping atoms; cell contents equal to Z × formula when the file gives
    both; fewest atoms (coordinates such as 1/8 are special positions in the intended
    choice and general ones in the other); origin choice 2 on a tie.
    """
    per_unit = _parse_formula(gemmi_string(block.find_value("_chemical_formula_sum")) or "")
    z = _number(block, "_cell_formula_units_Z")
    positions = _one_per_row(sites)
    scored = []
    for sg in candidates:
        rot, tran = _ops_arrays(sg.operations())
        images = [_images(cell, s, rot, tran) for s in positions]
        fract = np.vstack(images)
        occ = np.concatenate([[s.occ] * len(im) for s, im in zip(positions, images)])
        i, j, _ = _close_pairs(cell, fract, MIN_SITE_SEPARATION_ANGSTROM)
        overlaps = bool(np.any(occ[i] + occ[j] > 1.0 + 1e-3))
        matches = True
        if per_unit and z:
            n_images = {s.row: len(im) for s, im in zip(positions, images)}
            counts: dict[str, float] = {}
            for s in sites:
                counts[s.element] = counts.get(s.element, 0.0) + s.occ * n_images[s.row]
            matches = all(abs(counts.get(e, 0.0) - z * n) < 0.05 * z * n for e, n in per_unit.items())
        scored.append(((overlaps, not matches, len(fract), sg.ext != "2"), sg))
    scored.sort(key=lambda t: t[0])
    (overlaps, mismatch, _, _), best = scored[0]
    why = (
        "the other choice overlaps atoms or breaks the formula"
        if scored[1][0][:2] != (overlaps, mismatch)
        else "fewest atoms per cell"
    )
    if scored[1][0][:3] == scored[0][0][:3]:
        why = "both choices give the same cell contents: check the source"
    return best, why


def gemmi_string(value) -> str | None:
    import gemmi

    return None if value in (None, "?", ".") else gemmi.cif.as_string(value)


def _system_from_cell(cell) -> str:
    a, b, c, al, be, ga = cell
    right = [abs(x - 90) < 1e-3 for x in (al, be, ga)]
    if all(right):
        if abs(a - b) < 1e-6 and abs(b - c) < 1e-6:
            return "cubic"
        return "tetragonal" if abs(a - b) < 1e-6 else "orthorhombic"
    if right[0] and right[1] and abs(ga - 120) < 1e-3:
        return "hexagonal"
    if sum(right) == 2:
        return "monoclinic"
    return "triclinic"


def _formula_and_z(block, elements, occ) -> tuple[str, float]:
    """Formula (as in the CIF, or reduced from the cell contents) and formula units per cell."""
    import gemmi

    counts: dict[str, float] = {}
    for e, o in zip(elements, occ):
        counts[e] = counts.get(e, 0.0) + float(o)
    given = block.find_value("_chemical_formula_sum")
    z_given = _number(block, "_cell_formula_units_Z")
    if given not in (None, "?", "."):
        formula = " ".join(gemmi.cif.as_string(given).split())
        per_unit = _parse_formula(formula)
        if per_unit:
            el = max(per_unit, key=lambda k: counts.get(k, 0))
            z = counts.get(el, 0.0) / per_unit[el] if per_unit[el] else float("nan")
            return formula, round(z, 3) if z_given is None else float(z_given)
    # reduce the cell contents by their greatest common divisor
    ints = {e: round(c, 3) for e, c in counts.items()}
    z = 1
    if all(abs(v - round(v)) < 1e-3 for v in ints.values()):
        z = math.gcd(*[int(round(v)) for v in ints.values()]) or 1
    order = sorted(ints, key=lambda e: (e != "C", e != "H", e)) if "C" in ints else sorted(ints)
    formula = " ".join(f"{e}{_fmt_count(ints[e] / z)}" for e in order)
    return formula, float(z if z_given is None else z_given)


def _fmt_count(x: float) -> str:
    return "" if abs(x - 1) < 1e-6 else (f"{int(round(x))}" if abs(x - round(x)) < 1e-6 else f"{x:g}")


def _parse_formula(formula: str) -> dict[str, float]:
    import re

    out: dict[str, float] = {}
    for sym, num in re.findall(r"([A-Z][a-z]?)\s*([0-9]*\.?[0-9]*)", formula):
        out[sym] = out.get(sym, 0.0) + (float(num) if num not in ("", ".") else 1.0)
    return out


def _title(block, fallback: str) -> str:
    import gemmi

    for tag in _TITLE_TAGS:
        v = block.find_value(tag)
        if v not in (None, "?", "."):
            text = " ".join(gemmi.cif.as_string(v).split())
            if text:
                return text[:200]
    return fallback
