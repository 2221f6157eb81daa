from moerun.cli import entry

entry()
