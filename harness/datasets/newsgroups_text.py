"""Removing the parts of a Usenet message that leak its newsgroup: headers, signature blocks, quoted replies.

Common practice for 20 Newsgroups: the headers name the group, and signatures and
quotes repeat other messages. The rules match scikit-learn's ``remove=`` option of
``fetch_20newsgroups`` message for message (checked in the tests).
"""

from __future__ import annotations

import re

QUOTE_LINE = re.compile(r"(writes in|writes:|wrote:|says:|said:|^In article|^Quoted from|^\||^>)")
PARTS = ("headers", "footers", "quotes")


def without_headers(message: str) -> str:
    """Everything after the first blank line (the header block ends there); nothing if there is none."""
    return message.partition("\n\n")[2]


def without_footer(message: str) -> str:
    """Drop the signature: everything from the last line made only of dashes (or blank) onwards."""
    lines = message.strip().split("\n")
    for position in range(len(lines) - 1, -1, -1):
        if lines[position].strip().strip("-") == "":
            break
    if position > 0:
        return "\n".join(lines[:position])
    return message


def without_quotes(message: str) -> str:
    """Drop quoted lines and the lines that introduce a quote ("... writes:")."""
    return "\n".join(line for line in message.split("\n") if not QUOTE_LINE.search(line))


def stripped_message(message: str, parts: tuple[str, ...]) -> str:
    """Apply the removals in the fixed order headers, footers, quotes."""
    if "headers" in parts:
        message = without_headers(message)
    if "footers" in parts:
        message = without_footer(message)
    if "quotes" in parts:
        message = without_quotes(message)
    return message
