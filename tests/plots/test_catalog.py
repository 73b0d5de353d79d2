"""The figures of a run folder are one table: the schema, the export's file list and the writer read it."""

from fieldplan.plots.catalog import ANIMATION_FILE, RUN_FIGURES
from fieldplan.scenario import PLOT_NAMES, SCHEMA
from fieldplan.workflows.export import FILES


def test_one_table_feeds_schema_and_export():
    assert PLOT_NAMES == tuple(RUN_FIGURES)
    for name, fig in RUN_FIGURES.items():
        assert FILES[name] == fig.file and fig.file.endswith(".png") and callable(fig.draw)
    assert FILES["animation"] == ANIMATION_FILE
    assert any(k.name == "plots" for k in SCHEMA["outputs"])


def test_importing_the_catalogue_does_not_load_matplotlib():
    import subprocess
    import sys

    code = "import fieldplan.plots.catalog, sys; print('matplotlib' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
