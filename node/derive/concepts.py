"""Quantity concepts of our maps (the Quantity Definition of a Real World Value Mapping).

Standard codes where DICOM has a fitting one; otherwise a code of our own private coding
scheme, declared in the object's Coding Scheme Identification Sequence (0008,0110) of the
SOP Common Module (PS3.3 C.12.1), which is where a private scheme is identified. Private coding scheme designators begin with ``99``
(PS3.3 section 8.2, "Coding Scheme Designator"; from memory).
"""

from __future__ import annotations

from highdicom.sr.coding import CodedConcept
from pydicom import Dataset

PRIVATE_SCHEME = "99CESTNODE"
PRIVATE_SCHEME_NAME = "cest-node quantities"
PRIVATE_SCHEME_ORG = "cest-node project"
PRIVATE_SCHEME_VERSION = "1"

# DCM 113098 "Magnetization Transfer Ratio" sits in PS3.16 CID 7180 (Abstract
# Multi-dimensional Image Model Component Semantics) and CID 218 (Quantitative Image
# Features), as listed in pydicom's copy of PS3.16. MTRasym(dw) = MTR(+dw) - MTR(-dw) =
# Z(-dw) - Z(+dw) (Zhou et al., Nat Med 2003;9:1085; from memory) is a difference of two magnetisation
# transfer ratios, expressed like an MTR in percent of M0, so this is the closest standard
# concept. The T1-normalised MTRasym, APT* and AREX are no longer MTRs (AREX is a rate in
# s-1, Zaiss et al., NMR Biomed 2014;27:240; from memory), so they get private codes rather than a
# standard code that would mislabel them.
MTR = CodedConcept("113098", "DCM", "Magnetization Transfer Ratio")

_PRIVATE: dict[str, tuple[str, str]] = {
    "mtr_asym_t1": ("CN-MTRASYM-T1", "T1-normalized MTR asymmetry"),
    "apt_star": ("CN-APTSTAR", "APT* amide proton transfer contrast"),
    "arex": ("CN-AREX", "Apparent exchange-dependent relaxation"),
    "lda": ("CN-LDA-APT", "Lorentzian difference amide contrast"),
    "multi_lorentzian": ("CN-MLOR-APT", "Multi-Lorentzian amide pool amplitude"),
    "aptr_star": ("CN-APTRSTAR", "APTR* Bloch-McConnell amide ratio"),
}
_STANDARD: dict[str, CodedConcept] = {"mtr_asym": MTR}


def quantity_concept(method: str, title: str) -> CodedConcept:
    """The quantity concept of a method's map.

    A method without an entry gets a private code made from its name (upper case, at most
    16 characters, the SH limit of Code Value) with ``title`` as meaning, so a new method
    never needs a code before it can be written.
    """
    if method in _STANDARD:
        return _STANDARD[method]
    if method in _PRIVATE:
        value, meaning = _PRIVATE[method]
    else:
        value, meaning = f"CN-{method.upper()}"[:16], (title or method)[:64]
    return CodedConcept(value, PRIVATE_SCHEME, meaning)


def is_private(concept: CodedConcept) -> bool:
    return str(concept.scheme_designator) == PRIVATE_SCHEME


def declare_private_scheme(ds: Dataset) -> None:
    """Add our scheme to the Coding Scheme Identification Sequence (SOP Common, Type 3)."""
    item = Dataset()
    item.CodingSchemeDesignator = PRIVATE_SCHEME
    item.CodingSchemeName = PRIVATE_SCHEME_NAME
    item.CodingSchemeVersion = PRIVATE_SCHEME_VERSION
    item.CodingSchemeResponsibleOrganization = PRIVATE_SCHEME_ORG
    seq = list(ds.get("CodingSchemeIdentificationSequence", []))
    if not any(getattr(x, "CodingSchemeDesignator", "") == PRIVATE_SCHEME for x in seq):
        seq.append(item)
    ds.CodingSchemeIdentificationSequence = seq
