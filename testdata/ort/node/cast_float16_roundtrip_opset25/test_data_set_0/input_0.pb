BxJ0ต>BU\B*HธAJ=ยjฺภ?-zBfฑByz'ยฏA97มไดB
$iย