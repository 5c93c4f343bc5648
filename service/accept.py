"""Content negotiation of a result: does an Accept header prefer the CSV table to the JSON document?"""

from __future__ import annotations

__all__ = ["wants_csv"]


def wants_csv(accept: str) -> bool:
    """True when an Accept header prefers text/csv to JSON: a higher q, or the same q and listed first.

    A header that merely mentions text/csv among others (``application/json, text/csv;q=0.5``) gets JSON.
    """
    csv_rank = json_rank = None
    for position, part in enumerate(accept.split(",")):
        media, *options = [item.strip() for item in part.split(";")]
        q = 1.0
        for option in options:
            name, _, number = option.partition("=")
            if name.strip() == "q":
                try:
                    q = float(number)
                except ValueError:
                    q = 0.0
        rank = (q, -position)
        if media.lower() == "text/csv":
            csv_rank = rank if csv_rank is None else max(csv_rank, rank)
        elif media.lower() in ("application/json", "application/*", "*/*"):
            json_rank = rank if json_rank is None else max(json_rank, rank)
    if csv_rank is None or csv_rank[0] <= 0:
        return False
    return json_rank is None or csv_rank > json_rank
