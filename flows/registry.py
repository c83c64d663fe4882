"""Built-in step names and where their StepSpecs live.

Kept as module paths (not imports) so loading a flow definition imports only the
steps it uses.
"""

BUILTIN_STEPS: dict[str, tuple[str, str]] = {
    "extract": ("thresher.steps.extract", "EXTRACT"),
    "boilerplate": ("thresher.steps.boilerplate", "BOILERPLATE"),
    "clean": ("thresher.steps.clean", "CLEAN"),
    "language": ("thresher.steps.language", "LANGUAGE"),
    "split": ("thresher.steps.split", "SPLIT"),
    "personal": ("thresher.steps.personal", "PERSONAL"),
    "dedup": ("thresher.steps.dedup", "DEDUP"),
    "tokens": ("thresher.steps.tokens", "TOKENS"),
}
