
BlogitsJPJrŽ=QSV¿'Í¾q7›>bƒ}?’“¾JÊ»¿!5
?Æ4?Ü«À¼OL‘>¾YœÍ¾ÒLe¾rÃ÷>šuF=Âp¿EŠ>*¨œ>¸Îj=