from synth.cli import main

main()
