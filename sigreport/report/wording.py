"""Report wording: filling the lexicon's sentence templates (``wording.toml``, parsed by
:func:`sigreport.lexicon_tables.load_wording`).

Sentence pieces, titles and role names are data (``lexicon/wording.toml``), so a site can reword
the draft without code. Behaviour phrases and graded wording ("markedly hyperintense") are
chosen once, by characterization (:class:`sigreport.model.LesionPhrases`); the report only
renders them.
"""

from __future__ import annotations

from sigreport.errors import InputError
from sigreport.lexicon_tables import WORDING_FILE, Wording, load_wording, placeholders
from sigreport.model import role_sort_key

__all__ = ["WORDING_FILE", "Wording", "fill", "load_wording", "placeholders", "role_sort_key"]


def fill(template: str, where: str, *, section: str = "sentences", **values: str) -> str:
    """``template`` with its ``{name}`` placeholders replaced by ``values``, with an
    ``InputError`` naming the lexicon key when the site's wording uses a placeholder the report
    does not provide, or one that is not a plain name."""
    try:
        placeholders(template)
        return template.format(**values)
    except (KeyError, IndexError, ValueError) as exc:
        raise InputError(
            f"wording.toml [{section}] {where}: cannot fill {template!r} ({exc!r}); "
            f"available placeholders: {', '.join(sorted(values))}"
        ) from None
