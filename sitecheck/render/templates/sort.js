document.querySelectorAll('table.sortable th').forEach(function(th,i){th.addEventListener('click',function(){
var t=th.closest('table'),b=t.tBodies[0],r=Array.from(b.rows),d=th.dataset.d==='a'?-1:1;th.dataset.d=d>0?'a':'d';
var key=function(x){var c=x.cells[i];return c?(c.dataset.v||c.textContent):'';};
r.sort(function(x,y){var a=key(x),c=key(y),fa=parseFloat(a.replace(/^[≤<]\s*/,'')),fc=parseFloat(c.replace(/^[≤<]\s*/,''));
if(!isNaN(fa)&&!isNaN(fc))return d*(fa-fc);return d*a.localeCompare(c);});
r.forEach(function(x){b.appendChild(x);});});});
