"""stagefit's REST service (Flask); a thin door onto the ``optimizer`` package."""
