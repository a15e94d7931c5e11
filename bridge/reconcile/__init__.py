"""Reconciliation: does the receiving system hold exactly what was sent?

The core (pure): :mod:`.engine` (what was sent against what is held: one verdict each),
:mod:`.search` (identifier searches batched into OR-lists, held resources matched back) and
:mod:`.bundles` (the resources of a sent transaction Bundle as expected resources, and the
Bundle that heals them). The shell: :mod:`.client` (the searches over the destination's HTTP
client), :mod:`.source` (what was sent: the ledger, or an archive through the one pipeline),
:mod:`.run` (both forms, and ``--resend``) and :mod:`.report` (``reconcile.csv``,
``summary.json``, ``report.html``). ``docs/reconcile.md`` walks through both forms.
"""
