from topoclass.cli import main

main()
