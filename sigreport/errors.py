"""The one exception a caller must catch: bad input, which the CLI prints with exit code 2."""


class InputError(Exception):
    """The input (study, case file, lexicon, option) cannot be used; the message says which
    file or field and why, in one line a user can act on."""
