from pipeline.commands.cli import console

console()
