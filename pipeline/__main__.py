from pipeline.cli import console

console()
