"""Command-line arguments that make each example a short run in the documentation's gallery."""

#: Arguments per example file; an example not listed runs with its defaults.
SHORT_RUNS = {
    "plain_md.py": ["--steps", "2000"],
    "plain_md_with_bias.py": ["--steps", "4000"],
    "restart.py": ["--steps", "4000"],
}


def reset_argv(gallery_conf, script_vars):
    """sphinx-gallery hook: the arguments an example runs with in the gallery."""
    from pathlib import Path

    return list(SHORT_RUNS.get(Path(script_vars["src_file"]).name, []))
