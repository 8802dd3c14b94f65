"""sigreport.align"""
