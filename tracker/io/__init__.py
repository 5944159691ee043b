"""The open exchange format: one CSV file or ``.xlsx`` sheet per table (see :mod:`.specs`).

Reading (:mod:`.reading`) turns files into text cells with line numbers;
validation (:mod:`.validate`, :mod:`.columns`) checks and converts whole columns
at once and collects every problem; :mod:`.export` writes the same format back.
The database side of an import lives in :mod:`tracker.services.importing`.
"""
