"""Build hook: render docs/notebooks/*.ipynb as pages from their stored outputs.

Nothing is executed: nbconvert's HTML exporter (basic template) turns the saved cells and
outputs into HTML, which becomes a generated Markdown page beside the notebook file.
"""

from __future__ import annotations

from pathlib import Path


def on_files(files, config):
    import nbformat
    from mkdocs.structure.files import File
    from nbconvert import HTMLExporter

    exporter = HTMLExporter(template_name="basic")
    exporter.exclude_input_prompt = True
    exporter.exclude_output_prompt = True
    docs = Path(config["docs_dir"])
    for path in sorted((docs / "notebooks").glob("*.ipynb")):
        nb = nbformat.read(path, as_version=4)
        body, _ = exporter.from_notebook_node(nb)
        title = path.stem.replace("_", " ")
        text = (f"# Notebook: {title}\n\nRendered from the stored outputs of "
                f"[{path.name}]({path.name}) (not re-run when the site is built).\n\n"
                f'<div class="notebook">\n{body}\n</div>\n')
        files.append(File.generated(config, f"notebooks/{path.stem}.md", content=text))
    return files
