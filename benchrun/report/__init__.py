"""The signed lot acceptance report, in four steps whose module names say which is which.

1. Facts (pure data): ``run_sources`` reads the run folder's files once; ``facts_gather``
   turns a run, its ``LotGrade`` and those sources into a ``facts.ReportContent`` of strings
   and SI floats (``facts_*`` helpers: numbers, method wording, tables); ``manifest`` hashes
   what the numbers rest on; ``raw_waveforms`` reads and re-analyses a raw shot.
2. Pages: ``pages_pdf`` lays the facts out (``pages`` is the order and wording of the
   sections, ``pages_blocks`` tables and banners, ``pages_figures`` the plots drawn as vectors
   by ``pages_vector``, ``pages_style`` fonts and colours, ``pages_loss`` the loss section).
3. Signing: ``keys`` (identities), ``sign`` (embedded JSON + PAdES signature).
4. Verifying: ``verify`` (entry) with ``verify_checks``, ``verify_signature``,
   ``verify_data`` and ``verify_reanalysis``.

``render`` runs steps 1-3 and registers the report (``registry``); ``publish`` grades a
stored run first. No two modules of this package import each other.
"""
