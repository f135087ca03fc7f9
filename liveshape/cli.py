def main(argv=None):
    raise SystemExit("liveshape: command line not built yet")
