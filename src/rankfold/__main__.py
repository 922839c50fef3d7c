from rankfold.cli import run

run()
