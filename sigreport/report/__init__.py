"""sigreport.report"""
