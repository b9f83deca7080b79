"""The commands: argument parsing (cli), validate, report and the README's config
reference (docs). May import every other layer."""
