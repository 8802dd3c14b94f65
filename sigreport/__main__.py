from sigreport.cli import main

main()
