"""Command-line arguments that make each example a short run in the documentation's gallery."""

#: Arguments per example file; an example not listed runs with its defaults.
SHORT_RUNS = {
    "plain_md.py": ["--steps", "2000"],
    "plain_md_with_bias.py": ["--steps", "4000"],
    "restart.py": ["--steps", "4000"],
    "reweight_from_trajectory.py": ["--steps", "40000"],
}


def reset_argv(gallery_conf, script_vars):
    """sphinx-gallery hook: the arguments an example runs with in the gallery."""
    from pathlib import Path

    return list(SHORT_RUNS.get(Path(script_vars["src_file"]).name, []))


_shown = set()


def png_scraper(block, block_vars, gallery_conf):
    """sphinx-gallery image scraper: the PNG files an example wrote (anywhere below the folder it runs in)
    since the last block, shown on its page. gridbias draws on its own Figure objects, which the matplotlib
    scraper does not see; the files are what a user of the example gets."""
    import glob
    import os
    import shutil

    from sphinx_gallery.scrapers import figure_rst

    folder = os.path.dirname(block_vars["src_file"])
    names = []
    for png in sorted(glob.glob(os.path.join(folder, "**", "*.png"), recursive=True)):
        stamp = (png, os.path.getmtime(png))
        if stamp in _shown:
            continue
        _shown.add(stamp)
        target = block_vars["image_path_iterator"].next()
        shutil.copyfile(png, target)
        names.append(target)
    return figure_rst(names, gallery_conf["src_dir"])
