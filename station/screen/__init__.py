"""Outlier screening (part average testing) and lot control.

`robust` robust statistics; `pat_table` the PAT layer of a limit table; `pat_limits` static
limits from datalogs (`station limits pat`); `pat_apply` a passing part against PAT limits;
`dynamic_pat` limits from a lot's own baseline; `offline` `station pat`; `lot_rules` the
lot-control rules and the alarms they raise.
"""
