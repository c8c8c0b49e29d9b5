(function(){
  document.querySelectorAll('table.sortable').forEach(function(table){
    var heads = table.tHead.rows[0].cells;
    Array.prototype.forEach.call(heads, function(th, col){
      if(!th.dataset.type){return;}
      th.addEventListener('click', function(){
        var asc = !th.classList.contains('asc');
        Array.prototype.forEach.call(heads, function(h){h.classList.remove('asc','desc');});
        th.classList.add(asc ? 'asc' : 'desc');
        var body = table.tBodies[0];
        var rows = Array.prototype.slice.call(body.rows);
        var num = th.dataset.type === 'num';
        rows.sort(function(a, b){
          var x = a.cells[col].dataset.value, y = b.cells[col].dataset.value;
          if(x === '' && y === ''){return 0;}
          if(x === ''){return 1;}
          if(y === ''){return -1;}
          var c = num ? parseFloat(x) - parseFloat(y) : x.localeCompare(y);
          return asc ? c : -c;
        });
        rows.forEach(function(r){body.appendChild(r);});
      });
    });
  });
})();
