"""Present: the command line, terminal tables and the HTML report; nothing here computes results."""
