"""sigreport.measure"""
