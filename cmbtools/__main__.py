from cmbtools.cli import run

run()
