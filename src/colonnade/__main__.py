from ._startup import main

main()
