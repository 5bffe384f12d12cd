"""Rewrite the field tables of docs/results-schema.md from the shipped JSON Schema.

    python docs/generate_results_schema.py           # rewrite the generated section
    python docs/generate_results_schema.py --check   # exit 1 when the page is out of date

The tables sit between the two marker comments below; everything else on the page is prose.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from stackdr.io import field_reference

PAGE = Path(__file__).with_name("results-schema.md")
START = (
    "<!-- Field reference generated from stackdr/io/results.schema.json by "
    "docs/generate_results_schema.py; edit the schema, not these tables. -->"
)
END = "<!-- End of the generated field reference. -->"


def regenerated(text: str) -> str:
    """The page with the text between the markers replaced by the current field reference."""
    head, rest = text.split(START + "\n", 1)
    _, tail = rest.split(END, 1)
    return f"{head}{START}\n\n{field_reference()}\n\n{END}{tail}"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="only check, do not write")
    args = parser.parse_args(argv)
    text = PAGE.read_text(encoding="utf-8")
    new = regenerated(text)
    if args.check:
        if new != text:
            print(f"{PAGE} is out of date; run python {Path(__file__).as_posix()}")
            return 1
        return 0
    PAGE.write_text(new, encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
