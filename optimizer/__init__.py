"""stagefit's engine: requirements spec -> search space -> vectorised stage models
-> constraints and objectives -> Optuna -> ranked candidates.

Pure computation; no web code lives here (the REST service in ``api`` calls in).
"""
