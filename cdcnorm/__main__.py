from cdcnorm.cli import entry

entry()
