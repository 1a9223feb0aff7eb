from speedbench.cli import entry

entry()
