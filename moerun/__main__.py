from moerun.cli.main import entry

entry()
