"""Words every output shares: the caution printed by the command line, written in
reports and shown in the panel."""

CAUTION = ("tempofield is a research tool, not a diagnostic device: its rates are not clinical heart-rate or "
           "ciliary-beat-frequency measurements. Defer to clinical standards and local practice.")
