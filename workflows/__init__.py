"""The integration layer: joins the registry, the catalogue, the numerics and the documents.

Runs, dossier assembly, findings, the verdict engine, catalogue sync, plan drafting, decision rules and checking,
study audits and the demo live here, so that the command line stays a thin layer and a notebook can attach its own
results to a registry.
"""
