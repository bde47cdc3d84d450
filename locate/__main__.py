from locate.cli import main

main()
