// optreserve report: sort on a heading click, filter by typed text. No libraries, no network.
(function(){
  function val(td){var v=td.getAttribute('data-v');
    if(v!==null){return v===''?-Infinity:parseFloat(v);} return td.textContent.toLowerCase();}
  document.querySelectorAll('table.sortable').forEach(function(t){
    var heads=t.tHead.rows[0].cells;
    Array.prototype.forEach.call(heads,function(th,k){
      th.addEventListener('click',function(){
        var asc=th.getAttribute('aria-sort')!=='ascending';
        Array.prototype.forEach.call(heads,function(h){h.removeAttribute('aria-sort');});
        th.setAttribute('aria-sort',asc?'ascending':'descending');
        var body=t.tBodies[0],rows=Array.prototype.slice.call(body.rows);
        rows.sort(function(a,b){var x=val(a.cells[k]),y=val(b.cells[k]);
          return (x<y?-1:x>y?1:0)*(asc?1:-1);});
        rows.forEach(function(r){body.appendChild(r);});
      });
    });
  });
  document.querySelectorAll('input.filter').forEach(function(box){
    var t=document.getElementById(box.getAttribute('data-table'));
    if(!t){return;}
    box.addEventListener('input',function(){
      var q=box.value.toLowerCase();
      Array.prototype.forEach.call(t.tBodies[0].rows,function(r){
        r.style.display=r.textContent.toLowerCase().indexOf(q)<0?'none':'';});
    });
  });
})();
