"""The codes shared by the compiled byte scans (:mod:`service.feeds.ndjson_scan`) and the reader that
reads their output (:mod:`service.feeds.ndjson_columns`), in a module without numba."""

#: orjson's nesting limit: a line with more ``{``/``[`` goes to the validator.
MAX_OPEN = 64
#: Digits a double holds exactly, whatever parser reads them.
MAX_DIGITS = 15
#: A line's class: blank, plain (Arrow may parse it), for the validator, or read by the compiled parse.
BLANK, PLAIN, CHECK, PARSED = 0, 1, 2, 3
#: The JSON type of a value (none: null or absent).
NONE, STRING, NUMBER, BOOLEAN = 0, 1, 2, 3
