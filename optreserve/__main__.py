from optreserve.cli.app import run

run()
