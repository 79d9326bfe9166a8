"""Headings that group the commands in `ivdossier --help`."""

REGISTRY = "Registry: programs, candidates, team"
THREATS = "Threats and the causal graph"
EVIDENCE = "Estimation and evidence"
LITERATURE = "Earlier studies and pre-analysis plans"
DOCUMENTS = "Documents"
MOVING = "Demo, export and backup"
