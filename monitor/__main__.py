from monitor.cli import entry_point

# The guard matters: worker processes started with the "spawn" method (compute.workers) import
# this module again under another name, and must not run the command line a second time.
if __name__ == "__main__":
    entry_point()
