"""Crystallinity of a sample from its fitted rings and halos.

Labels (docs/design.md): ``crystalline`` (rings only; includes nanocrystalline films whose rings are
broadened but indexable), ``amorphous`` (only broad halos), ``mixed`` (halo and rings: a partly
crystallised film), ``no_signal`` (nothing above the detection threshold, or no usable bins).

The physics behind the one width threshold: a ring of FWHM w in g from crystallites of diameter
D has w ≈ K_w/D with K_w = 1.1067 for spheres on the FWHM (Langford & Wilson 1978). Below about 1.5 nm
the "crystallites" are a few atomic shells and diffraction cannot tell them from an amorphous
structure (common practice, from memory), so a component broader than K_w/1.5 nm = 0.74 nm⁻¹ is a halo. Sharp
rings and nanocrystal rings down to ≈ 2 nm (w ≈ 0.55 nm⁻¹) stay below it; the first halo of the
random dense packing of :mod:`ringid.synthetic.amorphous` is fitted at ≈ 0.82–0.85 nm⁻¹. Rings of 2 nm
crystallites that merge (111 + 200) come out as broad as the threshold, which is why a sample
is called ``mixed`` only when its halos are clearly broader than its rings (see
``mixed_min_width_ratio``).
"""

from __future__ import annotations

from dataclasses import dataclass

K_W_SPHERE = 1.1067  # Scherrer constant of spheres on the FWHM (Langford & Wilson, J. Appl. Cryst. 11, 102, 1978)


@dataclass(frozen=True)
class CrystallinityThresholds:
    """Thresholds of the crystallinity classification (future config keys).

    halo_min_fwhm_per_nm : components at least this broad (in g, 1/nm) are halos. Default
        K_w/1.5 nm = 0.74 nm⁻¹: a coherent size below 1.5 nm.
    mixed_min_fraction : the minor kind (halo or rings) must scatter at least this fraction of
        the total fitted area for the sample to be called ``mixed``; a smaller contribution is
        reported as a flag (``trace_halo`` / ``trace_rings``). Default 0.05: about the smallest
        amorphous (or crystalline) fraction that ring areas, which carry a few-percent
        background uncertainty, can establish.
    mixed_min_width_ratio : a partly crystallised film shows sharp rings on a broad halo; the
        halos must be at least this many times broader than the (area-weighted) rings to call
        the sample ``mixed``. Broad components of similar width are one population (the rings
        of ~2 nm crystallites merge into features as broad as the threshold), and the sample is
        labelled by the area-weighted mean FWHM of all components instead (flag
        ``near_amorphous_limit``). Default 2.
    """

    halo_min_fwhm_per_nm: float = round(K_W_SPHERE / 1.5, 2)
    mixed_min_fraction: float = 0.05
    mixed_min_width_ratio: float = 2.0


@dataclass(frozen=True)
class Crystallinity:
    """label and what it rests on: number of rings and halos and the halo share of the area."""

    label: str
    n_rings: int
    n_halos: int
    halo_area_fraction: float
    flags: tuple[str, ...] = ()


def classify(
    rings, thresholds: CrystallinityThresholds = CrystallinityThresholds(), *, usable: bool = True
) -> Crystallinity:
    """Classify a sample from its fitted components (:class:`ringid.core.model.Ring` list).

    A component is a halo when its FWHM ≥ ``thresholds.halo_min_fwhm_per_nm``, unless the ring
    stage found it to be an unresolved band of rings (kind "band"; see ``band_misfit_fraction``
    in :func:`ringid.profile.rings.fit_rings`): a band counts as rings.
    """
    if not usable:
        return Crystallinity("no_signal", 0, 0, float("nan"), ("unusable_profile",))
    halos = [r for r in rings if r.fwhm_per_nm >= thresholds.halo_min_fwhm_per_nm and r.kind != "band"]
    sharp = [r for r in rings if r.fwhm_per_nm < thresholds.halo_min_fwhm_per_nm]
    bands = [r for r in rings if r.kind == "band" and r.fwhm_per_nm >= thresholds.halo_min_fwhm_per_nm]
    if not halos and not sharp:
        return Crystallinity("no_signal", 0, 0, float("nan"))
    halo_area = sum(max(r.area, 0.0) for r in halos)
    # an unresolved band of rings scatters as rings (its width is not a coherent size)
    ring_area = sum(max(r.area, 0.0) for r in sharp + bands)
    total = halo_area + ring_area
    fraction = halo_area / total if total > 0 else float("nan")
    flags: list[str] = []
    if halos and sharp:
        ring_width = sum(r.fwhm_per_nm * max(r.area, 0.0) for r in sharp) / max(ring_area, 1e-300)
        halo_width = sum(r.fwhm_per_nm * max(r.area, 0.0) for r in halos) / max(halo_area, 1e-300)
        mean_width = (ring_width * ring_area + halo_width * halo_area) / max(total, 1e-300)
        if halo_width < thresholds.mixed_min_width_ratio * ring_width:
            label = "amorphous" if mean_width >= thresholds.halo_min_fwhm_per_nm else "crystalline"
            return Crystallinity(label, len(sharp), len(halos), fraction, ("near_amorphous_limit",))
        if fraction < thresholds.mixed_min_fraction:
            label, flags = "crystalline", ["trace_halo"]
        elif 1.0 - fraction < thresholds.mixed_min_fraction:
            label, flags = "amorphous", ["trace_rings"]
        else:
            label = "mixed"
    elif halos:
        label = "amorphous"
    else:
        label = "crystalline"
    return Crystallinity(label, len(sharp), len(halos), fraction, tuple(flags))
