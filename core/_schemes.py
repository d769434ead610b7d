"""Label schemes and mapping tables, kept as data in ``midstream/data/*.tsv``.

Every table has three tab-separated columns, ``tag``, ``target`` and ``source``: a corpus tag, what
it maps to, and the manual section (with a short reason) the row comes from. A first line reading
``tag<TAB>target<TAB>source``, blank lines and lines starting with ``#`` are skipped.

Tables served by name (``mapping_rows``):

``swbd42``
    the SWBD-DAMSL 42 clustered classes → coarse :class:`UtteranceFunction` (``swbd42_coarse.tsv``)
``mrda``, ``maptask``
    those corpora's label sets → coarse function (``mrda_coarse.tsv``, ``maptask_coarse.tsv``)
``swbd_damsl``
    SWBD-DAMSL base tags and the manual's kept combinations → the 42 classes (``swbd_damsl.tsv``)

Tables are read once per process (``functools.cache``) and are safe to share between threads.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import cache, lru_cache
from importlib import resources

from midstream._errors import InputError
from midstream._types import UtteranceFunction

_HEADER = ("tag", "target", "source")

#: Table file (without ``.tsv``) of each scheme name ``mapping_rows`` accepts.
_TABLES: dict[str, str] = {
    "maptask": "maptask_coarse",
    "mrda": "mrda_coarse",
    "swbd42": "swbd42_coarse",
    "swbd_damsl": "swbd_damsl",
}

#: Schemes ``coarse_function`` accepts.
_COARSE_SCHEMES = ("maptask", "mrda", "swbd42")

#: The 42 clustered classes in the order of the manual's table (§1c, most frequent first).
#: ``%`` covers two table rows (Abandoned and Uninterpretable share the code); ``o``, ``oo_co_cc``,
#: ``aap_am`` and ``arp_nd`` name the manual's grouped lines.
SWBD42_CLASSES: tuple[str, ...] = (
    "sd", "b", "sv", "aa", "%", "ba", "qy", "x", "ny", "fc", "qw", "nn", "bk", "h", "qy^d", "o",
    "bh", "^q", "bf", "na", "ad", "^2", "b^m", "qo", "qh", "^h", "ar", "ng", "br", "no", "fp",
    "qrr", "arp_nd", "t3", "oo_co_cc", "t1", "bd", "aap_am", "^g", "qw^d", "fa", "ft",
)

# A caret dimension is one letter or digit after "^"; "(^q)" marks quoted material inside an act
# of another kind and is dropped like the other secondary dimensions (manual §1c).
_PARENTHESISED = re.compile(r"\([^)]*\)")
_COMBINATION = re.compile(r"[,;]")
_DIMENSION = re.compile(r"\^[a-z0-9]")
#: Diacritics outside the act itself: "@" bad slash-unit segmentation, "*" a coder's comment.
_DROP_MARKS = str.maketrans("", "", "@*")
#: The secondary dimensions whose combination with a base tag the manual keeps as its own class.
_KEPT = frozenset({"qy^d", "qw^d", "b^m", "nn^e", "ny^e"})


@dataclass(frozen=True, slots=True, kw_only=True)
class MappingRow:
    """One row of a mapping table: ``tag`` maps to ``target``, as ``source`` says."""

    tag: str
    target: str
    source: str


@cache
def _table(scheme: str) -> tuple[MappingRow, ...]:
    try:
        name = _TABLES[scheme]
    except KeyError:
        known = ", ".join(sorted(_TABLES))
        raise InputError(f"unknown label scheme {scheme!r} (known: {known})") from None
    path = resources.files("midstream").joinpath("data", f"{name}.tsv")
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(
            f"mapping table for scheme {scheme!r} is missing: data/{name}.tsv"
        ) from None
    rows: list[MappingRow] = []
    seen: set[str] = set()
    for number, line in enumerate(text.splitlines(), start=1):
        if not line.strip() or line.startswith("#"):
            continue
        fields = tuple(line.split("\t"))
        if fields == _HEADER:
            continue
        if len(fields) != 3 or not all(f.strip() for f in fields):
            raise InputError(f"data/{name}.tsv:{number}: expected tag, target and source, "
                             f"separated by tabs, all non-empty")
        tag, target, source = (f.strip() for f in fields)
        if tag in seen:
            raise InputError(f"data/{name}.tsv:{number}: tag {tag!r} appears twice")
        seen.add(tag)
        rows.append(MappingRow(tag=tag, target=target, source=source))
    return tuple(rows)


@cache
def _lookup(scheme: str) -> dict[str, str]:
    return {row.tag: row.target for row in _table(scheme)}


def mapping_rows(scheme: str) -> tuple[MappingRow, ...]:
    """Rows of one mapping table, in file order.

    Parameters
    ----------
    scheme : str
        ``"swbd42"``, ``"mrda"`` or ``"maptask"`` (fine class → coarse function), or
        ``"swbd_damsl"`` (SWBD-DAMSL tag → 42 classes).

    Raises
    ------
    InputError
        For an unknown scheme, or a table that is missing or malformed.

    Examples
    --------
    >>> next(r.target for r in mapping_rows("swbd42") if r.tag == "sd")
    'statement'
    """
    return _table(scheme)


@lru_cache(maxsize=4096)
def swbd42_class(tag: str) -> str:
    """The 42-class cluster of a SWBD-DAMSL tag as written in the SwDA ``.utt`` files.

    Follows the manual's clustering (§1c): the first act of a combination (``sd,o@``) counts;
    ``@``/``*`` marks and parenthesised quotation marks (``sd(^q)``) are dropped; secondary caret
    dimensions are removed except ``qy^d``, ``qw^d``, ``b^m`` (kept) and ``nn^e``, ``ny^e``
    (folded into ``ng``, ``na``); a tag that is only a caret dimension (``^q``, ``^2``, ``^h``,
    ``^g``) is its own class; then the manual's grouped tags are merged.

    Raises
    ------
    InputError
        When the tag is not a SWBD-DAMSL act (for instance ``+``, which continues an earlier
        utterance and has no class of its own).

    Examples
    --------
    >>> swbd42_class("qy^d^t"), swbd42_class("sd(^q)@"), swbd42_class("nn^e"), swbd42_class("fx")
    ('qy^d', 'sd', 'ng', 'sv')
    """
    act = _COMBINATION.split(tag.strip(), maxsplit=1)[0]
    act = _PARENTHESISED.sub("", act).translate(_DROP_MARKS)
    head = act.split("^", 1)[0]
    dimensions = _DIMENSION.findall(act[len(head):])
    if not head:
        key = dimensions[0] if dimensions else ""
    else:
        key = next((head + d for d in dimensions if head + d in _KEPT), head)
    table = _lookup("swbd_damsl")
    if key not in table:
        raise InputError(f"unknown SWBD-DAMSL tag {tag!r} in scheme 'swbd_damsl'")
    return table[key]


def coarse_function(scheme: str, fine_class: str) -> UtteranceFunction:
    """The coarse utterance function of a fine class of ``scheme``.

    Parameters
    ----------
    scheme : str
        ``"swbd42"``, ``"mrda"`` or ``"maptask"``.
    fine_class : str
        A class of that scheme (for SwDA, one of :data:`SWBD42_CLASSES`).

    Raises
    ------
    InputError
        For an unknown scheme or a class the scheme's table does not list.

    Examples
    --------
    >>> coarse_function("swbd42", "br").value
    'clarification_request'
    """
    if scheme not in _COARSE_SCHEMES:
        raise InputError(f"unknown label scheme {scheme!r} (known: {', '.join(_COARSE_SCHEMES)})")
    target = _lookup(scheme).get(fine_class)
    if target is None:
        raise InputError(f"unknown tag {fine_class!r} in scheme {scheme!r}")
    return _function(scheme, fine_class, target)


@cache
def _function(scheme: str, fine_class: str, target: str) -> UtteranceFunction:
    try:
        return UtteranceFunction(target)
    except ValueError:
        raise InputError(f"scheme {scheme!r} maps {fine_class!r} to {target!r}, "
                         f"which is not a coarse utterance function") from None
