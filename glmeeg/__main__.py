from ._console import main

main()
