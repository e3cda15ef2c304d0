from .present.cli import main

main(prog_name="composition")
