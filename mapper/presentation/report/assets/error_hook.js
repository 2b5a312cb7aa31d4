/* Runs before anything else: records uncaught script errors on the page itself. */
window.addEventListener('error',function(e){var r=document.documentElement;
var n=Number(r.getAttribute('data-script-errors')||'0')+1;r.setAttribute('data-script-errors',String(n));});
