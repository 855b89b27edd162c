"""The end line of a blend file: an end marker carrying the SHA-256 digest of everything above it.

A blend file's last line is::

    # xrec blend file ends here; sha256 of the lines above: <64 lowercase hex digits>

It is a TOML comment, so the file stays plain TOML for any other reader. The digest covers
the file's bytes (UTF-8) from the first byte up to and including the newline before the end
line. A file cut short anywhere (for instance exactly before a ``[sources.NAME]`` table,
where the rest would still be valid TOML) has no end line; a file changed after it was
written has a digest that no longer matches. Both are refused with a message naming the
file and the problem.
"""

from __future__ import annotations

import hashlib
import re

from xrec.errors import ConfigError

END_PREFIX = "# xrec blend file ends here; sha256 of the lines above: "
_END_LINE = re.compile(r"^# xrec blend file ends here; sha256 of the lines above: (?P<digest>[0-9a-f]{64})$")
REEXPORT_HINT = (
    "write it again with `xrec export SPEC -o FILE` or xrec.blendfile.save_blend(...); "
    "after a deliberate hand edit, xrec.blendfile.reseal_blend(FILE) checks the content and writes a new end line"
)


def digest_of(body: str) -> str:
    """SHA-256 (hex) of ``body`` encoded as UTF-8."""
    return hashlib.sha256(body.encode("utf-8")).hexdigest()


def seal(body: str) -> str:
    """``body`` (ending with a newline, one is added if missing) followed by its end line."""
    if not body.endswith("\n"):
        body += "\n"
    return f"{body}{END_PREFIX}{digest_of(body)}\n"


def unseal(text: str, label: str) -> str:
    """The text above a valid end line, or a :class:`ConfigError` saying what is wrong.

    Parameters
    ----------
    text
        The whole file, decoded.
    label
        How to name the file in messages (its path).
    """
    body, last = split_last_line(text)
    match = _END_LINE.match(last)
    if match is None:
        if END_PREFIX in text:
            raise ConfigError(f"{label}: the end line is not the file's last line, or is damaged; {REEXPORT_HINT}")
        if _format_version(text) == 1:
            raise ConfigError(
                f"{label}: a format-1 blend file (no end line with a digest) is no longer read: {REEXPORT_HINT}"
            )
        raise ConfigError(
            f"{label}: no end line: the file is cut short (or was not written by xrec); {REEXPORT_HINT}"
        )
    if digest_of(body) != match.group("digest"):
        raise ConfigError(
            f"{label}: the content does not match the digest on its end line: the file was changed or damaged "
            f"after it was written; {REEXPORT_HINT}"
        )
    return body


def split_last_line(text: str) -> tuple[str, str]:
    """``(everything before the last line, the last line without its newline)``."""
    stripped = text[:-1] if text.endswith("\n") else text
    cut = stripped.rfind("\n") + 1
    return stripped[:cut], stripped[cut:]


def _format_version(text: str) -> object:
    import tomllib

    try:
        return tomllib.loads(text).get("format_version")
    except tomllib.TOMLDecodeError:
        return None
