"""What is published for a judged cell: the result JSON, the certificate's HTML and plots,
the PDF (an edge: WeasyPrint), the lot table, the hazards' cautions. May import the
core (model, acceptance, read, judge, rulebook); never the station or the demo.
"""
