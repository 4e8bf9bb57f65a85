"""The landing area: an output folder that accumulates conversion runs.

Layout (every name from a mapping passes through ``cdcnorm.names.path_part``)::

    events/<table>/<run>.jsonl|parquet     the run's envelopes, one table per folder
    quarantine/<table>/<run>.jsonl         its rejected rows
    index/emitted/<table>/<run>.parquet    identities the run emitted or merged (what later runs skip)
    index/pending/<table>/<run>.parquet    before-images still waiting for their after-image
    runs/<run>.json                        inputs (size, checksum), options, ledger: written last
    .cdcnorm/                              lock, journal, staging folders (never read as data)

``<run>`` sorts in run order (a zero-padded number, then the UTC time). A run
is all or nothing (``commit.py``): its files are written to a staging folder,
then a journal names every move, then they are moved into place and the run
record last; an interrupted publish is finished by the next run (``recover``),
an unfinished run's staging folder is removed by it.
"""

from cdcnorm.landing.area import Landing, open_landing

__all__ = ["Landing", "open_landing"]
