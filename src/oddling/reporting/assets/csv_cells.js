  // OWASP "CSV Injection": a cell starting with = + - @ TAB or CR (after any single quotes) gets
  // one more leading single quote, so a spreadsheet shows it as text instead of running it.
  var FORMULA_START = /^'*[=+\-@\t\r]/;
  function csvText(text) { return FORMULA_START.test(text) ? "'" + text : text; }
  function csvField(text) {
    return /[",\r\n]|^\s|\s$/.test(text) ? '"' + text.replace(/"/g, '""') + '"' : text;
  }
