"""The static atlas of a run folder: `render_atlas(run)` writes RUN/atlas/ (see render.py).

  render.py   what goes where in the atlas folder; redraws only layers whose inputs changed
  data.py     the numbers and names a layer page shows, read from the run folder
  html.py     escaped-by-default HTML for the run summary and the layer pages
  files.py    the folder's files: rewritten only when changed, images linked from the run
  comparison_page.py, comparison_data.py   the pages of a comparison folder (COMPARE/atlas/),
              drawn by `render_atlas(COMPARE_DIR)` and after each `compare` that writes a folder
  probe_page.py   the one-unit page of `unitlens probe`, in the atlas's look
  templates/, static/   the page skeleton, the stylesheet, the page scripts (atlas.js) and the
              inline-SVG plot renderer (plots.js)
"""
from .render import render_atlas

__all__ = ["render_atlas"]
