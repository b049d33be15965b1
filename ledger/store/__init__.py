"""The store: every SQL statement of the ledger (docs/architecture.md).

* :mod:`.session` — the unit of work: ``reading()``, ``writing()``, ``write(fn)`` with the
  busy retry and the one translation of database errors;
* :mod:`.db` — engines and connection settings; :mod:`.migrate` — schema on open;
  :mod:`.models` — the tables;
* one module per record kind, functions taking a session: :mod:`.plants`, :mod:`.loops`,
  :mod:`.requirements`, :mod:`.revisions`, :mod:`.results`, :mod:`.baselines`, and
  :mod:`.chain` (the hash chain) and :mod:`.audit` (its checks);
* :mod:`.queries` — shared helpers (the chunked ``IN``); :mod:`.view` — the ledger's read
  methods over one open session.

Nothing is imported here, so ``import ledger.store.db`` stays light.
"""
