"""What a person reads: the HTML dataset report (html), figures for beatmill why (figures), and
the lead survey behind beatmill leads (survey)."""
